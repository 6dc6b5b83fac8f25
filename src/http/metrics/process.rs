//! The `process_*` series every Prometheus client library exports on Linux
//! (names, types and units as the Go client's process collector writes
//! them), read from `/proc/self` at each render:
//!
//! - `process_cpu_seconds_total`: `utime + stime` of `/proc/self/stat`
//!   (fields 14, 15, clock ticks) over the clock tick rate, in seconds
//!   with the tick's resolution (not truncated to whole seconds);
//! - `process_resident_memory_bytes`: `rss` (field 24, pages) × page size;
//! - `process_virtual_memory_bytes`: `vsize` (field 23, bytes);
//! - `process_start_time_seconds`: `starttime` (field 22, ticks after
//!   boot) over the tick rate, plus `btime` of `/proc/stat`;
//! - `process_open_fds`: the entries of `/proc/self/fd`;
//! - `process_max_fds`: the soft "Max open files" of `/proc/self/limits`
//!   (`+Inf` when unlimited).
//!
//! Field numbers from proc(5). A file that cannot be read or parsed leaves
//! out its families (logged at debug; a scrape never fails for it).

use std::fmt::Write as _;
use std::io;

use super::text::push_value;

#[derive(Debug, thiserror::Error)]
pub enum ProcError {
    #[error("cannot read {path}: {source}")]
    Read {
        path: &'static str,
        #[source]
        source: io::Error,
    },
    #[error("{path}: {what}")]
    Parse { path: &'static str, what: String },
}

const STAT: &str = "/proc/self/stat";
const SYS_STAT: &str = "/proc/stat";
const LIMITS: &str = "/proc/self/limits";
const FD: &str = "/proc/self/fd";

/// The fields of `/proc/self/stat` the series need, as read.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Stat {
    pub utime_ticks: u64,
    pub stime_ticks: u64,
    pub start_ticks: u64,
    pub vsize_bytes: u64,
    pub rss_pages: u64,
}

/// Parses `/proc/[pid]/stat`. The command name (field 2) is in
/// parentheses and may hold spaces or parentheses itself: the fields are
/// counted after the last `)`.
pub fn parse_stat(text: &str) -> Result<Stat, ProcError> {
    let bad = |what: String| ProcError::Parse { path: STAT, what };
    let rest = text
        .rfind(')')
        .map(|p| &text[p + 1..])
        .ok_or_else(|| bad("no `)` after the command name".into()))?;
    // rest[0] is field 3 (state): field n is rest[n - 3].
    let fields: Vec<&str> = rest.split_ascii_whitespace().collect();
    let field = |n: usize| -> Result<u64, ProcError> {
        let s = fields
            .get(n - 3)
            .ok_or_else(|| bad(format!("field {n} missing")))?;
        s.parse()
            .map_err(|_| bad(format!("field {n} is not a count: {s:?}")))
    };
    Ok(Stat {
        utime_ticks: field(14)?,
        stime_ticks: field(15)?,
        start_ticks: field(22)?,
        vsize_bytes: field(23)?,
        rss_pages: field(24)?,
    })
}

/// `btime` (boot time, seconds since the Unix epoch) of `/proc/stat`.
pub fn parse_btime(text: &str) -> Result<u64, ProcError> {
    let line = text
        .lines()
        .find_map(|l| l.strip_prefix("btime "))
        .ok_or_else(|| ProcError::Parse {
            path: SYS_STAT,
            what: "no btime line".into(),
        })?;
    line.trim().parse().map_err(|_| ProcError::Parse {
        path: SYS_STAT,
        what: format!("btime is not a number: {line:?}"),
    })
}

/// The soft limit of "Max open files" in `/proc/[pid]/limits`
/// (`f64::INFINITY` for `unlimited`).
pub fn parse_max_files(text: &str) -> Result<f64, ProcError> {
    let bad = |what: String| ProcError::Parse { path: LIMITS, what };
    let line = text
        .lines()
        .find_map(|l| l.strip_prefix("Max open files"))
        .ok_or_else(|| bad("no `Max open files` line".into()))?;
    let soft = line
        .split_ascii_whitespace()
        .next()
        .ok_or_else(|| bad("`Max open files` has no soft limit".into()))?;
    if soft == "unlimited" {
        return Ok(f64::INFINITY);
    }
    soft.parse::<u64>()
        .map(|n| n as f64)
        .map_err(|_| bad(format!("soft limit is not a number: {soft:?}")))
}

fn read(path: &'static str) -> Result<String, ProcError> {
    std::fs::read_to_string(path).map_err(|source| ProcError::Read { path, source })
}

fn open_fds() -> Result<u64, ProcError> {
    let dir = std::fs::read_dir(FD).map_err(|source| ProcError::Read { path: FD, source })?;
    Ok(dir.filter(Result::is_ok).count() as u64)
}

/// One family: `(name, text)` as the static families are passed to the
/// encoder.
fn family(name: &str, help: &str, kind: &str, v: f64) -> (String, Vec<u8>) {
    let mut s = String::with_capacity(160);
    let _ = write!(s, "# HELP {name} {help}\n# TYPE {name} {kind}\n{name} ");
    push_value(&mut s, v);
    s.push('\n');
    (name.to_string(), s.into_bytes())
}

/// The `process_*` families readable now, in name order.
pub(crate) fn families() -> Vec<(String, Vec<u8>)> {
    let mut out = Vec::with_capacity(6);
    let log = |e: ProcError| tracing::debug!(error = %e, "process metrics");
    let tick = rustix::param::clock_ticks_per_second() as f64;
    let page = rustix::param::page_size() as f64;
    let stat = read(STAT).and_then(|t| parse_stat(&t)).map_err(log).ok();
    if let Some(s) = stat {
        out.push(family(
            "process_cpu_seconds_total",
            "Total user and system CPU time spent in seconds.",
            "counter",
            (s.utime_ticks + s.stime_ticks) as f64 / tick,
        ));
    }
    match read(LIMITS).and_then(|t| parse_max_files(&t)) {
        Ok(max) => out.push(family(
            "process_max_fds",
            "Maximum number of open file descriptors.",
            "gauge",
            max,
        )),
        Err(e) => log(e),
    }
    match open_fds() {
        Ok(n) => out.push(family(
            "process_open_fds",
            "Number of open file descriptors.",
            "gauge",
            n as f64,
        )),
        Err(e) => log(e),
    }
    if let Some(s) = stat {
        out.push(family(
            "process_resident_memory_bytes",
            "Resident memory size in bytes.",
            "gauge",
            s.rss_pages as f64 * page,
        ));
        match read(SYS_STAT).and_then(|t| parse_btime(&t)) {
            Ok(btime) => out.push(family(
                "process_start_time_seconds",
                "Start time of the process since unix epoch in seconds.",
                "gauge",
                btime as f64 + s.start_ticks as f64 / tick,
            )),
            Err(e) => log(e),
        }
        out.push(family(
            "process_virtual_memory_bytes",
            "Virtual memory size in bytes.",
            "gauge",
            s.vsize_bytes as f64,
        ));
    }
    out
}
