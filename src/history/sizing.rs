//! How big the history file grows at steady state, from the config alone
//! (`bandwatch check` prints it; docs/history.md "Sizing").
//!
//! Retention deletes spectra (oldest first) to stay under `max_mb`, but
//! never aggregates younger than `keep_days`: a config whose aggregates
//! alone exceed `max_mb` keeps the file over its bound for good (the
//! writer logs it once). This estimate lets the installer see it before
//! the year has passed.
//!
//! The bytes per stored row are measurements of this store, not laws:
//! `bench --only history` writes a simulated day and a year and reports
//! the file's pages in use per row and per spectrum; its "bytes per row"
//! row is the year's file against this module's row count.

use crate::config::{ChannelSpec, HistorySpec};

/// Bytes of file per aggregate row (a row of `points`, its share of the
/// primary-key b-tree and page slack), rounded up from what
/// `bench --only history` measured: 57 B per row for a year of one
/// channel written in order, 67 B for a day of 16 channels interleaved.
pub const ROW_BYTES: u64 = 72;

/// Bytes per stored spectrum besides its line values: the row's columns,
/// the bands' JSON and the shuffle-codec header, rounded up from the bench.
pub const SPECTRUM_OVERHEAD_BYTES: u64 = 512;

/// Series per channel besides its bands (the overall levels).
pub const OVERALL_SERIES: u64 = 5;

/// The steady-state size of the history of `channels` under `spec`.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct SizeEstimate {
    /// Aggregate rows kept at steady state (every channel, every series).
    pub rows: u64,
    /// Their bytes: retention never deletes these for `max_mb`.
    pub aggregate_bytes: u64,
    /// Timer spectra kept for `spectra_keep_days`, at most (their line
    /// values before compression: deflate saves 15 % on a noisy spectrum,
    /// more on a quiet one). Alarm and requested spectra come on top.
    pub spectra_bytes: u64,
    /// Timer spectra per day (every channel), for the days `max_mb`
    /// leaves them.
    pub spectra_bytes_per_day: u64,
}

impl SizeEstimate {
    /// Whether the aggregates alone would exceed `max_mb`.
    pub fn aggregates_over(&self, spec: &HistorySpec) -> bool {
        self.aggregate_bytes > spec.max_bytes
    }

    /// Days of timer spectra that fit beside the aggregates under
    /// `max_mb` when fewer than `spectra_keep_days` do (None: all fit, or
    /// there are none).
    pub fn spectra_days_fitting(&self, spec: &HistorySpec) -> Option<f64> {
        if self.spectra_bytes_per_day == 0
            || self.aggregate_bytes + self.spectra_bytes <= spec.max_bytes
        {
            return None;
        }
        let room = spec.max_bytes.saturating_sub(self.aggregate_bytes);
        Some(room as f64 / self.spectra_bytes_per_day as f64)
    }
}

/// Aggregate rows of one series kept at steady state: one per interval
/// for `thin_after_days` (or for `keep_days` when never thinned), then one
/// an hour up to `keep_days`.
pub fn rows_per_series(spec: &HistorySpec) -> u64 {
    let keep = u64::from(spec.keep_days);
    let fine_days = match spec.thin_after_days {
        0 => keep,
        t => u64::from(t).min(keep),
    };
    let per_day = 86_400 / u64::from(spec.interval_s.max(1));
    fine_days * per_day + (keep - fine_days) * 24
}

/// The estimate for `channels` (module docs).
pub fn estimate(spec: &HistorySpec, channels: &[ChannelSpec]) -> SizeEstimate {
    let per_series = rows_per_series(spec);
    let mut rows = 0u64;
    let mut spectra_bytes_per_day = 0u64;
    for ch in channels {
        rows += per_series * (OVERALL_SERIES + ch.bands.len() as u64);
        if spec.spectrum_every_s > 0 {
            let per_day = 86_400 / u64::from(spec.spectrum_every_s);
            let planes = if ch.envelope.is_some() { 2 } else { 1 };
            let one = 4 * ch.bins() as u64 * planes + SPECTRUM_OVERHEAD_BYTES;
            spectra_bytes_per_day += per_day * one;
        }
    }
    SizeEstimate {
        rows,
        aggregate_bytes: rows * ROW_BYTES,
        spectra_bytes: spectra_bytes_per_day * u64::from(spec.spectra_keep_days),
        spectra_bytes_per_day,
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn spec() -> HistorySpec {
        HistorySpec {
            file: "/nonexistent/h.sqlite".into(),
            interval_s: 60,
            keep_days: 365,
            thin_after_days: 30,
            spectrum_every_s: 600,
            spectra_keep_days: 90,
            max_bytes: 4096 << 20,
            queue: 8192,
            projection_window_s: 604_800,
        }
    }

    /// The defaults: 30 days of 1440 rows, then 335 days of 24 (the
    /// arithmetic of docs/history.md "Retention").
    #[test]
    fn rows_of_the_defaults() {
        assert_eq!(rows_per_series(&spec()), 30 * 1440 + 335 * 24);
        let never = HistorySpec {
            thin_after_days: 0,
            ..spec()
        };
        assert_eq!(rows_per_series(&never), 365 * 1440);
        let late = HistorySpec {
            thin_after_days: 400,
            ..spec()
        };
        assert_eq!(rows_per_series(&late), 365 * 1440);
    }

    fn channels(n: usize, bands: usize, envelope: bool) -> Vec<ChannelSpec> {
        let mut text = String::from(
            "[server]\nlisten = \"127.0.0.1:0\"\n[alarms]\nstorage_dir = \"/nonexistent\"\n\
             [[source]]\nname = \"s\"\nkind = \"sim\"\n",
        );
        // One channel parsed, repeated: the estimate reads only its
        // bands, lines and envelope.
        {
            text.push_str(
                "[[channel]]\nname = \"c\"\nsource = \"s\"\nindex = 0\nunit = \"g\"\n\
                 block = 8192\n",
            );
            if envelope {
                text.push_str("envelope = { lo_hz = 500.0, hi_hz = 5000.0 }\n");
            }
            for b in 0..bands {
                text.push_str(&format!(
                    "[[channel.band]]\nname = \"b{b}\"\nlo_hz = {}\nhi_hz = {}\nunit = \"g\"\n",
                    10 + 10 * b,
                    20 + 10 * b
                ));
            }
        }
        let one = crate::config::parse_str(&text)
            .expect("config")
            .channels
            .remove(0);
        vec![one; n]
    }

    /// 1024 channels of 10 bands at the defaults: the aggregates alone
    /// (about 56 GB) are far over the default 4096 MB, which the check
    /// warns of. 15 channels fit with their 90 days of spectra, 16 do not
    /// quite (docs/history.md "Sizing": about 15).
    #[test]
    fn a_large_installation_is_told_its_aggregates_exceed_max_mb() {
        let s = spec();
        let big = estimate(&s, &channels(1024, 10, false));
        assert_eq!(big.rows, 1024 * 15 * (30 * 1440 + 335 * 24));
        assert!(big.aggregates_over(&s));
        // 4097 lines of 4 bytes and the overhead, 144 a day, 90 days.
        let one = 4 * 4097 + SPECTRUM_OVERHEAD_BYTES;
        let fits = estimate(&s, &channels(15, 10, false));
        assert!(!fits.aggregates_over(&s));
        assert_eq!(fits.spectra_bytes_per_day, 15 * 144 * one);
        assert_eq!(fits.spectra_bytes, 90 * 15 * 144 * one);
        assert_eq!(fits.spectra_days_fitting(&s), None);
        let over = estimate(&s, &channels(16, 10, false));
        let days = over.spectra_days_fitting(&s).expect("fewer days");
        assert!(days > 80.0 && days < 90.0, "{days}");
        // With an envelope, twice the lines; under a small max_mb, the
        // days of spectra that fit beside the aggregates.
        let env = estimate(&s, &channels(2, 10, true));
        assert_eq!(env.spectra_bytes_per_day, 2 * 144 * (2 * 4 * 4097 + 512));
        let tight = HistorySpec {
            max_bytes: 256 << 20,
            ..s
        };
        assert!(!env.aggregates_over(&tight));
        let days = env.spectra_days_fitting(&tight).expect("fewer days");
        let want = ((256u64 << 20) - env.aggregate_bytes) as f64 / env.spectra_bytes_per_day as f64;
        assert!((days - want).abs() < 1e-9 && days < 90.0, "{days}");
    }
}
