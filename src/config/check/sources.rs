//! Checks of the `[[source]]` tables: names, and per kind the address,
//! reconnect waits, serial line settings, stream framing and the frame
//! shape (channels, sample rate), into `SourceSpec`s.

use std::collections::HashSet;
use std::net::SocketAddr;

use crate::config::issue::Issues;
use crate::config::raw::RawSource;
use crate::config::spec::{
    Backoff, Framing, SourceKind, SourceSpec, StreamSpec, SIM_CHANNELS, SIM_SAMPLE_RATE_HZ,
};
use crate::frame::SampleFormat;

/// Every `[[source]]`: at least one, names unique and not empty.
pub(super) fn check_sources(issues: &mut Issues, raw: &[RawSource]) -> Vec<SourceSpec> {
    let mut sources = Vec::new();
    let mut names = HashSet::new();
    for (i, s) in raw.iter().enumerate() {
        let path = format!("source[{i}] {:?}", s.name());
        if s.name().is_empty() {
            issues.add(format!("source[{i}].name"), "must not be empty");
        }
        if !names.insert(s.name().to_string()) {
            issues.add(
                format!("{path}.name"),
                "duplicate source name (names must be unique)",
            );
        }
        sources.push(check_source(issues, &path, s));
    }
    if raw.is_empty() {
        issues.add("source", "at least one [[source]] is required");
    }
    sources
}

/// One `[[source]]`, whatever its kind.
fn check_source(issues: &mut Issues, path: &str, s: &RawSource) -> SourceSpec {
    match s {
        RawSource::Sim {
            name,
            scenario,
            seed,
            speed,
        } => {
            if scenario != "p2-pump" {
                issues.add(
                    format!("{path}.scenario"),
                    format!("unknown scenario {scenario:?} (known: \"p2-pump\")"),
                );
            }
            if !(speed.is_finite() && *speed > 0.0 && *speed <= 1000.0) {
                issues.add(
                    format!("{path}.speed"),
                    format!("{speed} is out of range (0, 1000]"),
                );
            }
            SourceSpec {
                name: name.clone(),
                sample_rate_hz: SIM_SAMPLE_RATE_HZ,
                channels: SIM_CHANNELS,
                kind: SourceKind::Sim {
                    seed: *seed,
                    speed: *speed,
                },
            }
        }
        RawSource::TcpConnect {
            name,
            address,
            framing,
            channels,
            sample_rate_hz,
            sample_format,
            max_frame_bytes,
            reconnect_min_ms,
            reconnect_max_ms,
            idle_timeout_s,
        } => {
            let backoff = check_dial(issues, path, address, *reconnect_min_ms, *reconnect_max_ms);
            let idle_timeout = seconds(issues, &format!("{path}.idle_timeout_s"), *idle_timeout_s);
            let stream = check_stream(
                issues,
                path,
                framing,
                sample_format.as_deref(),
                *max_frame_bytes,
            );
            check_shape(issues, path, *channels, *sample_rate_hz);
            SourceSpec {
                name: name.clone(),
                sample_rate_hz: *sample_rate_hz,
                channels: *channels,
                kind: SourceKind::TcpConnect {
                    address: address.clone(),
                    stream,
                    backoff,
                    idle_timeout,
                },
            }
        }
        RawSource::TcpListen {
            name,
            listen,
            framing,
            channels,
            sample_rate_hz,
            sample_format,
            max_frame_bytes,
            on_second_connection,
            replace_after_silent_s,
            idle_timeout_s,
        } => {
            let addr = socket_addr(issues, &format!("{path}.listen"), listen);
            let idle_timeout = seconds(issues, &format!("{path}.idle_timeout_s"), *idle_timeout_s);
            let replace_after_silent = seconds(
                issues,
                &format!("{path}.replace_after_silent_s"),
                *replace_after_silent_s,
            );
            let stream = check_stream(
                issues,
                path,
                framing,
                sample_format.as_deref(),
                *max_frame_bytes,
            );
            check_shape(issues, path, *channels, *sample_rate_hz);
            SourceSpec {
                name: name.clone(),
                sample_rate_hz: *sample_rate_hz,
                channels: *channels,
                kind: SourceKind::TcpListen {
                    listen: addr,
                    stream,
                    on_second_connection: *on_second_connection,
                    replace_after_silent,
                    idle_timeout,
                },
            }
        }
        RawSource::Udp {
            name,
            listen,
            channels,
            sample_rate_hz,
            max_datagram_bytes,
        } => {
            let addr = socket_addr(issues, &format!("{path}.listen"), listen);
            check_shape(issues, path, *channels, *sample_rate_hz);
            if !(64..=65_507).contains(max_datagram_bytes) {
                issues.add(
                    format!("{path}.max_datagram_bytes"),
                    format!("{max_datagram_bytes} is out of range 64 to 65507"),
                );
            }
            SourceSpec {
                name: name.clone(),
                sample_rate_hz: *sample_rate_hz,
                channels: *channels,
                kind: SourceKind::Udp {
                    listen: addr,
                    max_datagram_bytes: *max_datagram_bytes,
                },
            }
        }
        RawSource::Serial {
            name,
            device,
            baud,
            data_bits,
            parity,
            stop_bits,
            flow_control,
            framing,
            channels,
            sample_rate_hz,
            sample_format,
            max_frame_bytes,
            reopen_ms,
        } => {
            check_serial_line(
                issues, path, device, *baud, *data_bits, *stop_bits, *reopen_ms,
            );
            let stream = check_stream(
                issues,
                path,
                framing,
                sample_format.as_deref(),
                *max_frame_bytes,
            );
            check_shape(issues, path, *channels, *sample_rate_hz);
            SourceSpec {
                name: name.clone(),
                sample_rate_hz: *sample_rate_hz,
                channels: *channels,
                kind: SourceKind::Serial {
                    device: device.clone(),
                    baud: *baud,
                    data_bits: *data_bits,
                    parity: *parity,
                    stop_bits: *stop_bits,
                    flow_control: *flow_control,
                    stream,
                    reopen_ms: *reopen_ms,
                },
            }
        }
    }
}

/// A `tcp-connect` source's address and reconnect waits.
fn check_dial(issues: &mut Issues, path: &str, address: &str, min_ms: u64, max_ms: u64) -> Backoff {
    if !address.contains(':') {
        issues.add(
            format!("{path}.address"),
            format!("{address:?} is not \"host:port\""),
        );
    }
    if min_ms == 0 || min_ms > max_ms {
        issues.add(
            format!("{path}.reconnect_min_ms"),
            format!("{min_ms} must be > 0 and <= reconnect_max_ms {max_ms}"),
        );
    }
    Backoff { min_ms, max_ms }
}

/// A `serial` source's device and line settings.
fn check_serial_line(
    issues: &mut Issues,
    path: &str,
    device: &str,
    baud: u32,
    data_bits: u8,
    stop_bits: u8,
    reopen_ms: u64,
) {
    if device.is_empty() {
        issues.add(format!("{path}.device"), "must not be empty");
    }
    if baud == 0 {
        issues.add(format!("{path}.baud"), "must be > 0");
    }
    if !(5..=8).contains(&data_bits) {
        issues.add(
            format!("{path}.data_bits"),
            format!("{data_bits} is not 5, 6, 7 or 8"),
        );
    }
    if !(1..=2).contains(&stop_bits) {
        issues.add(
            format!("{path}.stop_bits"),
            format!("{stop_bits} is not 1 or 2"),
        );
    }
    if reopen_ms == 0 {
        issues.add(format!("{path}.reopen_ms"), "must be > 0");
    }
}

fn socket_addr(issues: &mut Issues, path: &str, text: &str) -> SocketAddr {
    match text.parse::<SocketAddr>() {
        Ok(a) => a,
        Err(_) => {
            issues.add(
                path,
                format!("{text:?} is not an IP address with a port (e.g. \"127.0.0.1:7700\")"),
            );
            SocketAddr::from(([127, 0, 0, 1], 0))
        }
    }
}

/// Channels per frame and sample rate of a non-simulated source.
fn check_shape(issues: &mut Issues, path: &str, channels: usize, rate: f64) {
    if !(1..=1024).contains(&channels) {
        issues.add(
            format!("{path}.channels"),
            format!("{channels} is out of range 1 to 1024"),
        );
    }
    if !(rate.is_finite() && rate > 0.0 && rate <= 10e6) {
        issues.add(
            format!("{path}.sample_rate_hz"),
            format!("{rate} must be a finite number above 0 and at most 10 MHz"),
        );
    }
}

fn parse_format(s: &str) -> Option<SampleFormat> {
    SampleFormat::ALL.into_iter().find(|f| f.as_str() == s)
}

/// The stream keys of a byte-stream source: framing, sample format, frame size.
fn check_stream(
    issues: &mut Issues,
    path: &str,
    framing: &str,
    sample_format: Option<&str>,
    max_frame_bytes: usize,
) -> StreamSpec {
    let framing = match (framing, sample_format) {
        ("bwf1", None) => Framing::Bwf1,
        ("lines", None) => Framing::Lines,
        ("raw", Some(f)) => match parse_format(f) {
            Some(f) => Framing::Raw(f),
            None => {
                issues.add(
                    format!("{path}.sample_format"),
                    format!("unknown sample format {f:?} (known: i16, i24, i32, f32, f64)"),
                );
                Framing::Raw(SampleFormat::F32)
            }
        },
        ("raw", None) => {
            issues.add(
                format!("{path}.sample_format"),
                "is required with framing = \"raw\"",
            );
            Framing::Raw(SampleFormat::F32)
        }
        ("bwf1" | "lines", Some(_)) => {
            issues.add(
                format!("{path}.sample_format"),
                "only applies to framing = \"raw\" (BWF1 frames carry their format)",
            );
            Framing::Bwf1
        }
        (other, _) => {
            issues.add(
                format!("{path}.framing"),
                format!("unknown framing {other:?} (known: \"bwf1\", \"lines\", \"raw\")"),
            );
            Framing::Bwf1
        }
    };
    if !(64..=(256 << 20)).contains(&max_frame_bytes) {
        issues.add(
            format!("{path}.max_frame_bytes"),
            format!("{max_frame_bytes} is out of range 64 to 268435456"),
        );
    }
    StreamSpec {
        framing,
        max_frame_bytes,
    }
}

/// A duration in seconds, 0.1 s to one day.
fn seconds(issues: &mut Issues, path: &str, v: f64) -> std::time::Duration {
    issues.check_range(path.to_string(), v, 0.1, 86_400.0);
    std::time::Duration::try_from_secs_f64(v).unwrap_or(std::time::Duration::from_secs(1))
}

#[cfg(test)]
mod tests {
    use super::*;

    fn sources(text: &str) -> Vec<RawSource> {
        #[derive(serde::Deserialize)]
        struct File {
            source: Vec<RawSource>,
        }
        let f: File = toml::from_str(text).unwrap_or_else(|e| panic!("{text}: {e}"));
        f.source
    }

    #[test]
    fn duplicate_names_and_bad_udp_fields() {
        let raw = sources(
            r#"
            [[source]]
            name = "daq"
            kind = "sim"

            [[source]]
            name = "daq"
            kind = "udp"
            listen = "0.0.0.0"
            channels = 0
            sample_rate_hz = 1000
            max_datagram_bytes = 10
            "#,
        );
        let mut issues = Issues::default();
        let specs = check_sources(&mut issues, &raw);
        assert_eq!(specs.len(), 2);
        assert_eq!(
            issues.pairs(),
            vec![
                (
                    "source[1] \"daq\".name",
                    "duplicate source name (names must be unique)"
                ),
                (
                    "source[1] \"daq\".listen",
                    "\"0.0.0.0\" is not an IP address with a port (e.g. \"127.0.0.1:7700\")"
                ),
                ("source[1] \"daq\".channels", "0 is out of range 1 to 1024"),
                (
                    "source[1] \"daq\".max_datagram_bytes",
                    "10 is out of range 64 to 65507"
                ),
            ]
        );
    }

    #[test]
    fn no_source_at_all() {
        let mut issues = Issues::default();
        assert!(check_sources(&mut issues, &[]).is_empty());
        assert_eq!(
            issues.pairs(),
            vec![("source", "at least one [[source]] is required")]
        );
    }

    #[test]
    fn stream_keys() {
        let mut issues = Issues::default();
        let s = check_stream(&mut issues, "s", "raw", None, 32);
        assert_eq!(s.framing, Framing::Raw(SampleFormat::F32));
        assert_eq!(
            issues.pairs(),
            vec![
                ("s.sample_format", "is required with framing = \"raw\""),
                ("s.max_frame_bytes", "32 is out of range 64 to 268435456"),
            ]
        );

        let mut issues = Issues::default();
        let s = check_stream(&mut issues, "s", "raw", Some("i24"), 1 << 20);
        assert_eq!(s.framing, Framing::Raw(SampleFormat::I24));
        assert!(issues.is_empty(), "{issues:?}");
    }

    #[test]
    fn good_serial_source_has_no_issue() {
        let raw = sources(
            r#"
            [[source]]
            name = "rs485"
            kind = "serial"
            device = "/dev/ttyUSB0"
            baud = 115200
            channels = 2
            sample_rate_hz = 1000
            "#,
        );
        let mut issues = Issues::default();
        let specs = check_sources(&mut issues, &raw);
        assert!(issues.is_empty(), "{issues:?}");
        assert_eq!(specs[0].kind.as_str(), "serial");

        let mut issues = Issues::default();
        check_serial_line(&mut issues, "p", "", 0, 9, 3, 0);
        assert_eq!(
            issues.pairs(),
            vec![
                ("p.device", "must not be empty"),
                ("p.baud", "must be > 0"),
                ("p.data_bits", "9 is not 5, 6, 7 or 8"),
                ("p.stop_bits", "3 is not 1 or 2"),
                ("p.reopen_ms", "must be > 0"),
            ]
        );
    }
}
