//! The `memory` phase: resident bytes per channel and the total for the
//! largest channel count, measured in a child process (`bench
//! --memory-child C`) so that nothing else this process allocated is
//! counted. The child runs the dsp rig with alarms: the daemon's rings,
//! DSP and alarms, as `pipeline::Builder` assembles them.

use std::sync::Arc;

use serde::Serialize;

use crate::pipeline::RingSize;

use super::dsp::DspRig;
use super::input::{bench_config, test_signal, UNUSED_SOURCE};
use super::{io_err, BenchArgs, BenchError, Row, Summary, FS};

#[derive(Debug, Clone, Serialize, serde::Deserialize)]
pub(crate) struct MemoryProbe {
    pub(crate) channels: usize,
    pub(crate) rss_before: u64,
    pub(crate) rss_after: u64,
}

/// Resident set size of this process, bytes (from /proc/self/status).
pub(crate) fn rss_bytes() -> u64 {
    std::fs::read_to_string("/proc/self/status")
        .ok()
        .and_then(|t| vm_rss_bytes(&t))
        .unwrap_or(0)
}

/// The `VmRSS` line of a `/proc/PID/status` text, in bytes (the kernel
/// gives kB: proc(5)).
pub(crate) fn vm_rss_bytes(status: &str) -> Option<u64> {
    status
        .lines()
        .find(|l| l.starts_with("VmRSS:"))
        .and_then(|l| l.split_whitespace().nth(1))
        .and_then(|v| v.parse::<u64>().ok())
        .map(|kb| kb * 1024)
}

/// Builds `channels` channels with the default ring size, pushes enough
/// samples through that every ring has wrapped and two snapshots exist,
/// and reports resident memory before and after.
pub(crate) fn memory_probe(n: usize, channels: usize) -> Result<MemoryProbe, BenchError> {
    let config = bench_config(channels.max(1), n, FS, UNUSED_SOURCE)?;
    let signal = Arc::new(test_signal(4 * FS as usize, FS));
    let rss_before = rss_bytes();
    let mut rig = DspRig::build(&config, signal, true)?;
    let cap = RingSize::FromConfig.capacity(&config, &config.channels[0]);
    let rounds = cap.div_ceil(rig.chunk) + 3;
    for _ in 0..rounds {
        rig.round();
    }
    let rss_after = rss_bytes();
    std::hint::black_box(&rig);
    Ok(MemoryProbe {
        channels,
        rss_before,
        rss_after,
    })
}

fn memory_in_child(n: usize, channels: usize) -> Result<MemoryProbe, BenchError> {
    let exe = std::env::current_exe().map_err(io_err("current executable"))?;
    let out = std::process::Command::new(exe)
        .args([
            "bench",
            "--n",
            &n.to_string(),
            "--memory-child",
            &channels.to_string(),
        ])
        .output()
        .map_err(io_err("memory child"))?;
    let text = String::from_utf8_lossy(&out.stdout);
    serde_json::from_str(text.trim()).map_err(|e| {
        BenchError::Lost(format!(
            "memory child printed {text:?} ({e}); stderr {}",
            String::from_utf8_lossy(&out.stderr)
        ))
    })
}

/// The phase: per-channel and total RSS of the largest `--channels`, at
/// most 3 repeats.
pub(crate) fn memory_phase(args: &BenchArgs, rows: &mut Vec<Row>) -> Result<(), BenchError> {
    let n = args.n;
    let repeats = args.repeats.max(1);
    let largest = args.channels.iter().copied().max().unwrap_or(1024);
    let mut per = Vec::new();
    let mut total = Vec::new();
    for r in 0..repeats.min(3) {
        eprintln!("bench: memory repeat {}/{}", r + 1, repeats.min(3));
        let p = memory_in_child(n, largest)?;
        per.push((p.rss_after.saturating_sub(p.rss_before)) as f64 / largest as f64);
        total.push(p.rss_after as f64);
    }
    rows.push(Row {
        phase: "memory".into(),
        case: format!("per channel, N={n}"),
        unit: "bytes RSS".into(),
        value: Summary::of(&per),
        ratio: None,
        target: Some("< 1 MiB".into()),
    });
    rows.push(Row {
        phase: "memory".into(),
        case: format!("process, {largest} ch"),
        unit: "bytes RSS".into(),
        value: Summary::of(&total),
        ratio: None,
        target: None,
    });
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn rss_is_read() {
        assert!(rss_bytes() > 0);
    }

    #[test]
    fn vm_rss_line_is_parsed_in_kb() {
        // Layout of /proc/PID/status as proc(5) gives it.
        let t = "Name:\tbandwatch\nVmPeak:\t  900 kB\nVmRSS:\t  123456 kB\nRssAnon:\t 1 kB\n";
        assert_eq!(vm_rss_bytes(t), Some(123_456 * 1024));
        assert_eq!(vm_rss_bytes("Name:\tx\n"), None);
    }
}
