//! `[history]`: the history database on this PC (README "History",
//! docs/history.md). Present means on; every key has a default.
//!
//! ```toml
//! [history]
//! # file = "history.sqlite"      # default: in [alarms] storage_dir
//! interval_s = 60                # band and overall aggregates per interval
//! keep_days = 365                # aggregates older than this are deleted
//! thin_after_days = 30           # … and thinned to one row an hour after this
//! spectrum_every_s = 600         # a spectrum per channel this often (0: never on a timer)
//! spectra_keep_days = 90         # stored spectra older than this are deleted
//! max_mb = 4096                  # the file's bound: oldest spectra go first
//! queue = 8192                   # records waiting for the writer thread
//! projection_window_s = 604800   # time to limit fits this much stored history
//! ```

use std::path::PathBuf;

use serde::Deserialize;

use super::issue::Issues;

/// `[history]` as written.
#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawHistory {
    /// The SQLite file; default `history.sqlite` in `[alarms] storage_dir`.
    pub file: Option<PathBuf>,
    #[serde(default = "default_interval_s")]
    pub interval_s: u32,
    #[serde(default = "default_keep_days")]
    pub keep_days: u32,
    #[serde(default = "default_thin_after_days")]
    pub thin_after_days: u32,
    #[serde(default = "default_spectrum_every_s")]
    pub spectrum_every_s: u32,
    #[serde(default = "default_spectra_keep_days")]
    pub spectra_keep_days: u32,
    #[serde(default = "default_max_mb")]
    pub max_mb: u64,
    #[serde(default = "default_queue")]
    pub queue: usize,
    #[serde(default = "default_projection_window_s")]
    pub projection_window_s: u64,
}

fn default_interval_s() -> u32 {
    60
}
fn default_keep_days() -> u32 {
    365
}
fn default_thin_after_days() -> u32 {
    30
}
fn default_spectrum_every_s() -> u32 {
    600
}
fn default_spectra_keep_days() -> u32 {
    90
}
fn default_max_mb() -> u64 {
    4096
}
fn default_queue() -> usize {
    8192
}
fn default_projection_window_s() -> u64 {
    7 * 86_400
}

/// Seconds of the thinned rows (one an hour).
pub const THIN_SPAN_S: u32 = 3600;

/// `[history]`, checked.
#[derive(Debug, Clone, PartialEq)]
pub struct HistorySpec {
    /// Absolute once the config is loaded.
    pub file: PathBuf,
    pub interval_s: u32,
    pub keep_days: u32,
    /// 0: never thinned.
    pub thin_after_days: u32,
    /// 0: no spectra on a timer (at alarm transitions and on request only).
    pub spectrum_every_s: u32,
    pub spectra_keep_days: u32,
    pub max_bytes: u64,
    pub queue: usize,
    pub projection_window_s: u64,
}

/// `[history]`: the bounds of each key; `storage_dir` is `[alarms]`'s, the
/// default home of the file.
pub(crate) fn check_history(
    issues: &mut Issues,
    raw: Option<&RawHistory>,
    storage_dir: Option<&std::path::Path>,
) -> Option<HistorySpec> {
    let raw = raw?;
    let p = "history";
    let file = match (&raw.file, storage_dir) {
        (Some(f), _) if f.as_os_str().is_empty() => {
            issues.add(format!("{p}.file"), "must not be empty");
            None
        }
        (Some(f), _) => Some(f.clone()),
        (None, Some(d)) => Some(d.join(DEFAULT_FILE)),
        (None, None) => {
            issues.add(
                format!("{p}.file"),
                "give file, or [alarms] storage_dir to keep history.sqlite in",
            );
            None
        }
    };
    let before = issues.len();
    // An interval that divides an hour, so thinned rows hold whole intervals.
    if !(1..=3600).contains(&raw.interval_s) || !THIN_SPAN_S.is_multiple_of(raw.interval_s) {
        issues.add(
            format!("{p}.interval_s"),
            format!(
                "{} must divide 3600 (1, 2, 5, 10, 15, 30, 60, 300, 600, 900, 3600, …)",
                raw.interval_s
            ),
        );
    }
    if !(1..=36_500).contains(&raw.keep_days) {
        issues.add(
            format!("{p}.keep_days"),
            format!("{} is out of range 1 to 36500", raw.keep_days),
        );
    }
    if raw.thin_after_days != 0 && raw.thin_after_days >= raw.keep_days {
        issues.add(
            format!("{p}.thin_after_days"),
            format!(
                "{} must be below keep_days ({}), or 0 for never",
                raw.thin_after_days, raw.keep_days
            ),
        );
    }
    if raw.spectrum_every_s != 0 && !(10..=86_400).contains(&raw.spectrum_every_s) {
        issues.add(
            format!("{p}.spectrum_every_s"),
            format!(
                "{} is out of range 10 to 86400, or 0 for never",
                raw.spectrum_every_s
            ),
        );
    }
    if !(1..=36_500).contains(&raw.spectra_keep_days) {
        issues.add(
            format!("{p}.spectra_keep_days"),
            format!("{} is out of range 1 to 36500", raw.spectra_keep_days),
        );
    }
    if !(16..=1 << 24).contains(&raw.max_mb) {
        issues.add(
            format!("{p}.max_mb"),
            format!("{} is out of range 16 to 16777216", raw.max_mb),
        );
    }
    if !(64..=1 << 20).contains(&raw.queue) {
        issues.add(
            format!("{p}.queue"),
            format!("{} is out of range 64 to 1048576", raw.queue),
        );
    }
    if !(60..=366 * 86_400).contains(&raw.projection_window_s) {
        issues.add(
            format!("{p}.projection_window_s"),
            format!(
                "{} is out of range 60 to 31622400 (366 days)",
                raw.projection_window_s
            ),
        );
    }
    if issues.len() != before {
        return None;
    }
    Some(HistorySpec {
        file: file?,
        interval_s: raw.interval_s,
        keep_days: raw.keep_days,
        thin_after_days: raw.thin_after_days,
        spectrum_every_s: raw.spectrum_every_s,
        spectra_keep_days: raw.spectra_keep_days,
        max_bytes: raw.max_mb << 20,
        queue: raw.queue,
        projection_window_s: raw.projection_window_s,
    })
}

/// The file's name when `[history] file` is not given.
pub const DEFAULT_FILE: &str = "history.sqlite";

/// The history's names of a channel's overall levels (those of the
/// overall alarms, and two more): a band may not take one while
/// `[history]` is on, so a series name means one thing.
pub const OVERALL_SERIES: [&str; 5] = [
    "overall-rms",
    "overall-peak",
    "overall-peak-to-peak",
    "overall-crest-factor",
    "overall-mean",
];

/// With `[history]`: no band named like an overall series.
pub(crate) fn check_band_names(issues: &mut Issues, channels: &[crate::config::RawChannel]) {
    for c in channels {
        for b in &c.bands {
            if OVERALL_SERIES.contains(&b.name.as_str()) {
                issues.add(
                    format!("channel {:?} band {:?}.name", c.name, b.name),
                    format!(
                        "{:?} is the history's name of an overall level; rename the band",
                        b.name
                    ),
                );
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use std::path::Path;

    fn check(text: &str, dir: Option<&Path>) -> (Option<HistorySpec>, Vec<String>) {
        let raw: RawHistory = toml::from_str(text).expect("parses");
        let mut issues = Issues::default();
        let spec = check_history(&mut issues, Some(&raw), dir);
        let msgs = issues
            .into_vec()
            .into_iter()
            .map(|i| i.to_string())
            .collect();
        (spec, msgs)
    }

    #[test]
    fn defaults_and_the_file_in_storage_dir() {
        let (spec, issues) = check("", Some(Path::new("/var/lib/bw")));
        assert!(issues.is_empty(), "{issues:?}");
        let s = spec.expect("spec");
        assert_eq!(s.file, Path::new("/var/lib/bw/history.sqlite"));
        assert_eq!(
            (
                s.interval_s,
                s.keep_days,
                s.thin_after_days,
                s.spectrum_every_s
            ),
            (60, 365, 30, 600)
        );
        assert_eq!(s.max_bytes, 4096 << 20);
    }

    #[test]
    fn every_bad_key_is_named() {
        let (spec, issues) = check(
            "interval_s = 7\nkeep_days = 0\nthin_after_days = 400\nspectrum_every_s = 5\n\
             spectra_keep_days = 0\nmax_mb = 1\nqueue = 1\nprojection_window_s = 1",
            None,
        );
        assert!(spec.is_none());
        let all = issues.join("\n");
        for key in [
            "history.file",
            "history.interval_s",
            "history.keep_days",
            "history.thin_after_days",
            "history.spectrum_every_s",
            "history.spectra_keep_days",
            "history.max_mb",
            "history.queue",
            "history.projection_window_s",
        ] {
            assert!(all.contains(key), "{key} missing in:\n{all}");
        }
    }

    #[test]
    fn unknown_keys_are_refused() {
        assert!(toml::from_str::<RawHistory>("intervl_s = 60").is_err());
    }
}
