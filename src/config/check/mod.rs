//! Validation: `validate` turns a `RawConfig` into the typed `Config`. It
//! runs one small check per table, in file order — `[server]`, `[dsp]`,
//! `[[source]]`, `[[channel]]` (with its bands, health and alarms),
//! `[[machine]]`, `[alarms]` — and every check adds to the same `Issues`
//! list, so one run reports every problem. A check returns early only where
//! a later check of the same table needs an earlier result. The config is
//! accepted only when the list stays empty.
//!
//! This file holds `validate` and the checks of the small top-level tables;
//! the larger tables have a file each.

mod bands;
mod channel_alarms;
mod channels;
mod machines;
mod sources;

use std::net::SocketAddr;
use std::time::Duration;

use crate::config::alarms::{AlarmsSpec, RawAlarms};
use crate::config::issue::{ConfigIssue, Issues};
use crate::config::raw::{RawConfig, RawDsp, RawServer};
use crate::config::spec::{ChannelSpec, Config, HttpLimits};
use crate::config::web::{load_web_config, WebConfig};

/// Checks every rule and returns the typed config, or every problem found.
pub fn validate(raw: &RawConfig) -> Result<Config, Vec<ConfigIssue>> {
    let mut issues = Issues::default();
    let listen = check_server(&mut issues, &raw.server);
    let http = check_http_limits(&mut issues, &raw.server);
    let web = check_web_config(&mut issues, &raw.server);
    let trend_seconds = check_trend_seconds(&mut issues, &raw.server);
    let workers = check_dsp(&mut issues, &raw.dsp);
    let sources = sources::check_sources(&mut issues, &raw.sources);
    let channels = channels::check_channels(&mut issues, raw, &sources);
    check_ring_memory(&mut issues, raw.dsp.ring_seconds, &channels);
    let machines = machines::check_machines(&mut issues, &raw.machines, &raw.channels);
    let alarms = check_alarms_table(&mut issues, raw.alarms.as_ref(), &channels);
    let exposition = crate::config::exposition::check_metrics(&mut issues, &raw.metrics);
    let history = crate::config::history::check_history(
        &mut issues,
        raw.history.as_ref(),
        raw.alarms.as_ref().map(|a| a.storage_dir.as_path()),
    );
    if history.is_some() {
        crate::config::history::check_band_names(&mut issues, &raw.channels);
    }

    match (issues.is_empty(), listen) {
        (true, Some(listen)) => Ok(Config {
            alarms,
            listen,
            http,
            web,
            trend_seconds,
            exposition,
            history,
            workers,
            ring_seconds: raw.dsp.ring_seconds,
            sources,
            machines,
            channels,
        }),
        _ => Err(issues.into_vec()),
    }
}

/// `[server]`: the HTTP listen address.
fn check_server(issues: &mut Issues, raw: &RawServer) -> Option<SocketAddr> {
    match raw.listen.parse::<SocketAddr>() {
        Ok(a) => Some(a),
        Err(_) => {
            issues.add(
                "server.listen",
                format!(
                    "{:?} is not an IP address with a port (e.g. \"127.0.0.1:9750\")",
                    raw.listen
                ),
            );
            None
        }
    }
}

/// `[server]`: the HTTP server's connection cap and timeouts.
fn check_http_limits(issues: &mut Issues, raw: &RawServer) -> HttpLimits {
    if !(1..=65_536).contains(&raw.max_connections) {
        issues.add(
            "server.max_connections",
            format!("{} is out of range 1 to 65536", raw.max_connections),
        );
    }
    let mut seconds = |key: &str, v: f64| {
        issues.check_range(format!("server.{key}"), v, 0.1, 86_400.0);
        Duration::try_from_secs_f64(v).unwrap_or(Duration::from_secs(1))
    };
    HttpLimits {
        max_connections: raw.max_connections,
        header_timeout: seconds("header_timeout_s", raw.header_timeout_s),
        idle_timeout: seconds("idle_timeout_s", raw.idle_timeout_s),
        request_timeout: seconds("request_timeout_s", raw.request_timeout_s),
    }
}

/// Longest trend a channel keeps, seconds (`[server] trend_seconds`):
/// one day. README "Config reference" gives the memory this costs.
pub const MAX_TREND_SECONDS: u32 = 86_400;

/// `[server] trend_seconds`: 10 s to a day.
fn check_trend_seconds(issues: &mut Issues, raw: &RawServer) -> usize {
    if !(10..=MAX_TREND_SECONDS).contains(&raw.trend_seconds) {
        issues.add(
            "server.trend_seconds",
            format!(
                "{} is out of range 10 to {MAX_TREND_SECONDS}",
                raw.trend_seconds
            ),
        );
    }
    raw.trend_seconds.clamp(10, MAX_TREND_SECONDS) as usize
}

/// `[server] web_config`: the file is read and checked whole (TLS files,
/// key against certificate, bcrypt hashes); its error names its own field.
fn check_web_config(issues: &mut Issues, raw: &RawServer) -> Option<WebConfig> {
    let path = raw.web_config.as_ref()?;
    match load_web_config(path) {
        Ok(w) => Some(w),
        Err(e) => {
            issues.add("server.web_config", e.to_string());
            None
        }
    }
}

/// `[dsp]`: worker count (default: the CPU cores) and ring length.
fn check_dsp(issues: &mut Issues, raw: &RawDsp) -> usize {
    let workers = match raw.workers {
        None => std::thread::available_parallelism().map_or(1, |n| n.get()),
        Some(n) if (1..=256).contains(&n) => n,
        Some(n) => {
            issues.add("dsp.workers", format!("{n} is out of range 1 to 256"));
            1
        }
    };
    if !(raw.ring_seconds.is_finite() && (0.05..=600.0).contains(&raw.ring_seconds)) {
        issues.add(
            "dsp.ring_seconds",
            format!("{} is out of range 0.05 to 600", raw.ring_seconds),
        );
    }
    workers
}

/// Largest ring one channel may have, bytes (1 GiB: 268 435 456 f32
/// samples, e.g. 26 s of a 10 MHz channel). README, "Config reference".
pub const MAX_RING_BYTES_PER_CHANNEL: u64 = 1 << 30;

/// Largest sum of all channels' rings, bytes (8 GiB).
pub const MAX_RING_BYTES_TOTAL: u64 = 8 << 30;

/// Bytes of one channel's sample ring as the pipeline sizes it from
/// `[dsp] ring_seconds` (`ring_seconds × rate` f32 samples, at least two
/// blocks).
pub fn ring_bytes(ring_seconds: f64, spec: &ChannelSpec) -> u64 {
    let samples = (ring_seconds * spec.sample_rate_hz).ceil();
    // A float beyond u64 saturates; the bound check below refuses it.
    let samples = (samples as u64).max(2 * spec.block as u64);
    samples.saturating_mul(std::mem::size_of::<f32>() as u64)
}

/// `[dsp] ring_seconds` against the memory the rings would take: each
/// channel's ring at most [`MAX_RING_BYTES_PER_CHANNEL`], all of them
/// together at most [`MAX_RING_BYTES_TOTAL`]. Refused here, a ring that
/// cannot be allocated never reaches the allocator (which would abort).
fn check_ring_memory(issues: &mut Issues, ring_seconds: f64, channels: &[ChannelSpec]) {
    if !(ring_seconds.is_finite() && ring_seconds > 0.0) {
        return; // check_dsp has said so
    }
    let mut total: u64 = 0;
    for c in channels {
        let bytes = ring_bytes(ring_seconds, c);
        total = total.saturating_add(bytes);
        if bytes > MAX_RING_BYTES_PER_CHANNEL {
            issues.add(
                "dsp.ring_seconds",
                format!(
                    "{ring_seconds} s of channel {:?} at {} Hz needs a ring of {bytes} bytes, \
                     more than the {MAX_RING_BYTES_PER_CHANNEL} bytes a channel may have; \
                     lower ring_seconds",
                    c.name, c.sample_rate_hz
                ),
            );
        }
    }
    if total > MAX_RING_BYTES_TOTAL {
        issues.add(
            "dsp.ring_seconds",
            format!(
                "{ring_seconds} s of all {} channels needs rings of {total} bytes in all, \
                 more than the {MAX_RING_BYTES_TOTAL} bytes allowed; lower ring_seconds",
                channels.len()
            ),
        );
    }
}

/// `[alarms]`: required as soon as any channel has an alarm.
fn check_alarms_table(
    issues: &mut Issues,
    raw: Option<&RawAlarms>,
    channels: &[ChannelSpec],
) -> Option<AlarmsSpec> {
    match raw {
        None => {
            if channels.iter().any(|c| !c.alarms.is_empty()) {
                issues.add(
                    "alarms",
                    "alarms are configured but [alarms] (storage_dir for the journal and captures) is missing",
                );
            }
            None
        }
        Some(a) => match a.build("alarms") {
            Ok(a) => Some(a),
            Err(v) => {
                issues.extend(v);
                None
            }
        },
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn table<T: serde::de::DeserializeOwned>(text: &str) -> T {
        toml::from_str(text).unwrap_or_else(|e| panic!("{text}: {e}"))
    }

    #[test]
    fn server_listen_must_be_an_address_with_a_port() {
        let mut issues = Issues::default();
        let bad: RawServer = table("listen = \"localhost\"");
        assert_eq!(check_server(&mut issues, &bad), None);
        assert_eq!(
            issues.pairs(),
            vec![(
                "server.listen",
                "\"localhost\" is not an IP address with a port (e.g. \"127.0.0.1:9750\")"
            )]
        );

        let mut issues = Issues::default();
        let good: RawServer = table("listen = \"127.0.0.1:9750\"");
        assert_eq!(
            check_server(&mut issues, &good),
            Some(SocketAddr::from(([127, 0, 0, 1], 9750)))
        );
        assert!(issues.is_empty(), "{issues:?}");
    }

    #[test]
    fn dsp_ranges() {
        let mut issues = Issues::default();
        let bad: RawDsp = table("workers = 0\nring_seconds = 0.01");
        check_dsp(&mut issues, &bad);
        assert_eq!(
            issues.pairs(),
            vec![
                ("dsp.workers", "0 is out of range 1 to 256"),
                ("dsp.ring_seconds", "0.01 is out of range 0.05 to 600"),
            ]
        );

        let mut issues = Issues::default();
        let good: RawDsp = table("workers = 3\nring_seconds = 2.0");
        assert_eq!(check_dsp(&mut issues, &good), 3);
        assert!(issues.is_empty(), "{issues:?}");
    }

    #[test]
    fn alarms_table_is_checked_under_its_own_path() {
        let mut issues = Issues::default();
        let bad: RawAlarms = table("storage_dir = \"/x\"\njournal_max_files = 1");
        assert_eq!(check_alarms_table(&mut issues, Some(&bad), &[]), None);
        assert_eq!(
            issues.pairs(),
            vec![("alarms.journal_max_files", "1 is out of range 2 to 100")]
        );

        let mut issues = Issues::default();
        let good: RawAlarms = table("storage_dir = \"/x\"");
        assert!(check_alarms_table(&mut issues, Some(&good), &[]).is_some());
        assert!(check_alarms_table(&mut issues, None, &[]).is_none());
        assert!(issues.is_empty(), "{issues:?}");
    }
}
