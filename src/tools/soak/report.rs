//! The soak's result: each assertion as a named check with the figure it
//! was judged on, the figures themselves (`--json`), and the table printed
//! at the end.

use std::collections::BTreeMap;
use std::fmt::Write as _;

use crate::tools::soak::feed::Tally;
use crate::tools::soak::scrape::{ChannelBalance, Violation};

/// One assertion.
#[derive(Debug, Clone, serde::Serialize)]
pub struct Check {
    pub name: String,
    pub pass: bool,
    /// The figure it was judged on, with the bound.
    pub figure: String,
}

/// `/healthz` latency over the run.
#[derive(Debug, Clone, Default, serde::Serialize)]
pub struct Latency {
    pub requests: usize,
    pub failures: usize,
    pub first_failure: Option<String>,
    pub p50_ms: f64,
    pub p99_ms: f64,
    pub max_ms: f64,
    /// The highest p99 of any 10-second window.
    pub worst_window_p99_ms: f64,
}

/// Resident memory of the daemon, KiB: the anonymous part (RssAnon) is
/// checked; VmRSS is shown.
#[derive(Debug, Clone, Default, serde::Serialize)]
pub struct Memory {
    pub warmup_s: f64,
    /// Samples (one a second) in each median.
    pub window: usize,
    pub samples_after_warmup: usize,
    /// Median of the first ten samples after the warm-up.
    pub baseline_kib: u64,
    /// Median of the last ten samples.
    pub end_kib: u64,
    pub min_kib: u64,
    pub max_kib: u64,
    pub last_kib: u64,
    /// (end − baseline) / baseline, %: the figure checked.
    pub growth_pct: f64,
    /// (max − baseline) / baseline, %.
    pub peak_pct: f64,
    /// VmRSS (anonymous and file-backed) at the first and the last sample.
    pub vm_rss_first_kib: u64,
    pub vm_rss_last_kib: u64,
}

/// Captures named by the journal against the files on disk.
#[derive(Debug, Clone, Default, serde::Serialize)]
pub struct Captures {
    pub journal_events: usize,
    pub referenced: usize,
    pub present: usize,
    /// Referenced, with no `.json` on disk.
    pub missing: Vec<String>,
    /// Of the missing, those older than every capture kept (retention
    /// removes the oldest first).
    pub missing_pruned_oldest_first: usize,
    pub pruned_total: f64,
    pub dropped_total: f64,
    pub write_errors_total: f64,
    pub present_without_waveform: Vec<String>,
}

/// The daemon process.
#[derive(Debug, Clone, Default, serde::Serialize)]
pub struct Daemon {
    pub pid: u32,
    pub exit_code: Option<i32>,
    pub stop_s: f64,
    pub panics: usize,
    pub warnings: usize,
    pub errors: usize,
}

/// One source: what the feeder sent and the daemon's counters for it.
#[derive(Debug, Clone, Default, serde::Serialize)]
pub struct SourceFigures {
    pub sent: Tally,
    /// The daemon's counters of this source at the end.
    pub counters: BTreeMap<String, f64>,
}

#[derive(Debug, Clone, Default, serde::Serialize)]
pub struct Report {
    pub seconds: f64,
    pub dir: String,
    pub checks: Vec<Check>,
    pub sources: BTreeMap<String, SourceFigures>,
    pub balances: Vec<ChannelBalance>,
    pub healthz: Latency,
    pub memory: Memory,
    pub scrapes: usize,
    pub monotonic_series: usize,
    pub violations: Vec<Violation>,
    pub clients: BTreeMap<String, u64>,
    pub slowloris: BTreeMap<String, f64>,
    pub captures: Captures,
    pub alarm_transitions: f64,
    pub daemon: Daemon,
    /// SIGHUPs sent and the reloads the daemon counted.
    pub reload: String,
}

impl Report {
    pub fn check(&mut self, name: impl Into<String>, pass: bool, figure: impl Into<String>) {
        self.checks.push(Check {
            name: name.into(),
            pass,
            figure: figure.into(),
        });
    }

    pub fn passed(&self) -> bool {
        !self.checks.is_empty() && self.checks.iter().all(|c| c.pass)
    }

    /// The summary table.
    pub fn table(&self) -> String {
        let mut t = String::new();
        let w = self.checks.iter().map(|c| c.name.len()).max().unwrap_or(0);
        let _ = writeln!(
            t,
            "bandwatch soak: {:.0} s of faults, files in {}",
            self.seconds, self.dir
        );
        for c in &self.checks {
            let mark = if c.pass { "ok  " } else { "FAIL" };
            let _ = writeln!(t, "  {mark} {:<w$}  {}", c.name, c.figure);
        }
        let _ = writeln!(t, "  sources:");
        for (name, s) in &self.sources {
            let x = &s.sent;
            let _ = writeln!(
                t,
                "    {name}: {} instants/channel made in {} frames on the wire ({} dropped, {} corrupted, {} duplicated, {} reordered by the plan); {} bursts, {} DAQ restarts, {} forward jumps, {} wraps, {} bad headers, {} too large, {} frames with NaN/±Inf/±3e38",
                x.made_instants, x.wire_frames, x.dropped, x.corrupted, x.duplicated, x.reordered,
                x.bursts, x.daq_restarts, x.forward_jumps, x.wraps,
                x.bad_channel_headers + x.bad_rate_headers, x.too_large, x.special_frames
            );
            if x.sessions > 0 {
                let _ = writeln!(
                    t,
                    "      {} sessions, {} intruders refused, {} idle peers replaced, {} idle peers timed out (held ≤ {:.1} s)",
                    x.sessions, x.intruders_closed, x.idle_replaced, x.idle_timed_out, x.idle_held_max_s
                );
            }
        }
        let _ = writeln!(t, "  channels (made = received + dropped by reason):");
        for b in &self.balances {
            let drops: Vec<String> = b
                .dropped
                .iter()
                .filter(|(_, v)| **v > 0)
                .map(|(k, v)| format!("{k} {v}"))
                .collect();
            let _ = writeln!(
                t,
                "    {:<6} {} = {} + [{}]  difference {}",
                b.channel,
                b.made,
                b.received,
                drops.join(", "),
                b.difference
            );
        }
        let m = &self.memory;
        let _ = writeln!(
            t,
            "  anonymous RSS after {:.0} s warm-up: start {} KiB, end {} (medians of {}), min {}, max {}, last {} ({} samples); VmRSS {} KiB at the start, {} at the end",
            m.warmup_s, m.baseline_kib, m.end_kib, m.window, m.min_kib, m.max_kib, m.last_kib, m.samples_after_warmup, m.vm_rss_first_kib, m.vm_rss_last_kib
        );
        let h = &self.healthz;
        let _ = writeln!(
            t,
            "  /healthz: {} requests, p50 {:.2} ms, p99 {:.2} ms, max {:.2} ms, worst 10 s window p99 {:.2} ms",
            h.requests, h.p50_ms, h.p99_ms, h.max_ms, h.worst_window_p99_ms
        );
        let _ = writeln!(t, "  clients: {:?}", self.clients);
        let _ = writeln!(t, "  slowloris: {:?}", self.slowloris);
        let c = &self.captures;
        let _ = writeln!(
            t,
            "  captures: {} referenced by {} journal events, {} on disk, {} pruned (counter {}); alarm transitions {}",
            c.referenced, c.journal_events, c.present, c.missing.len(), c.pruned_total, self.alarm_transitions
        );
        let _ = writeln!(t, "  reload: {}", self.reload);
        let _ = writeln!(
            t,
            "{}",
            if self.passed() {
                "soak passed"
            } else {
                "soak FAILED"
            }
        );
        t
    }
}

/// The `q` quantile (0..=1) of `v` by the nearest-rank method (common
/// practice for latency percentiles).
pub fn quantile(v: &[f64], q: f64) -> f64 {
    if v.is_empty() {
        return 0.0;
    }
    let mut s = v.to_vec();
    s.sort_by(f64::total_cmp);
    let rank = (q * s.len() as f64).ceil() as usize;
    s[rank.clamp(1, s.len()) - 1]
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Nearest rank: the smallest value with at least q·n values at or
    /// below it (from memory).
    #[test]
    fn nearest_rank_quantiles() {
        let v: Vec<f64> = (1..=100).map(f64::from).collect();
        assert_eq!(quantile(&v, 0.99), 99.0);
        assert_eq!(quantile(&v, 0.5), 50.0);
        assert_eq!(quantile(&v, 1.0), 100.0);
        assert_eq!(quantile(&[3.0, 1.0, 2.0], 0.99), 3.0);
        assert_eq!(quantile(&[], 0.5), 0.0);
    }

    #[test]
    fn a_report_passes_only_with_every_check() {
        let mut r = Report::default();
        assert!(!r.passed(), "no check is no pass");
        r.check("a", true, "1");
        assert!(r.passed());
        r.check("b", false, "2 > 1");
        assert!(!r.passed());
        assert!(r.table().contains("FAIL b"));
    }
}
