//! The config the soak runs the daemon with: one UDP and one `tcp-listen`
//! source (`replace-silent`), four f32 channels each, an overall-RMS alarm
//! on channel 0 and a band alarm on channel 1 of each source, so trips and
//! captures happen while the faults run (README, "Config reference").

use std::fmt::Write as _;
use std::net::SocketAddr;
use std::path::Path;

/// Channels per source; the feeders send this many.
pub const CHANNELS: usize = 4;
/// Samples per second per channel.
pub const RATE_HZ: f64 = 25_600.0;
/// The UDP source's `max_datagram_bytes`: a frame of 256 instants is 4136
/// bytes, so a longer datagram is one the harness made too long on purpose.
pub const MAX_DATAGRAM: usize = 16_384;
/// The TCP source's `max_frame_bytes`: a header announcing 65 536 instants
/// of four f32 channels (1 MiB) is too large.
pub const MAX_FRAME: usize = 262_144;
/// `tcp-listen` timings: a newcomer replaces a peer silent this long …
pub const REPLACE_AFTER_SILENT_S: f64 = 1.0;
/// … and a peer silent this long is closed.
pub const IDLE_TIMEOUT_S: f64 = 4.0;
/// HTTP header timeout: slowloris connections are closed after it.
pub const HEADER_TIMEOUT_S: f64 = 3.0;
/// RMS alarm limits on channel 0 and the band alarm on channel 1 (g); the
/// feeders alternate the tone between [`crate::tools::soak::feed`]'s low
/// and high amplitudes, below and above them.
pub const ALERT_G: f64 = 0.5;
pub const DANGER_G: f64 = 1.0;
/// Captures kept: fewer than the soak makes, so retention prunes some.
pub const CAPTURE_MAX_COUNT: u32 = 6;

/// The addresses the daemon is given.
#[derive(Debug, Clone, Copy)]
pub struct Ports {
    pub http: SocketAddr,
    pub udp: SocketAddr,
    pub tcp: SocketAddr,
}

/// Tone frequency of each channel, Hz.
pub fn tone_hz(channel: usize) -> f64 {
    [160.0, 240.0, 410.0, 55.0][channel % CHANNELS]
}

/// Channel names of a source: `<source>-0` …
pub fn channel_name(source: &str, index: usize) -> String {
    format!("{source}-{index}")
}

/// The config text.
pub fn toml(ports: &Ports, storage: &Path) -> String {
    let mut t = String::new();
    let _ = writeln!(
        t,
        "# Written by `bandwatch soak` (DEVELOPERS.md, \"Soak test\").\n\
         [server]\nlisten = \"{}\"\nmax_connections = 1024\nheader_timeout_s = {HEADER_TIMEOUT_S}\n\
         idle_timeout_s = 10\nrequest_timeout_s = 10\n\n\
         [dsp]\nring_seconds = 2.0\nworkers = 2\n\n\
         [alarms]\nstorage_dir = {:?}\ncapture_pre_s = 1.0\ncapture_post_s = 1.0\n\
         capture_max_count = {CAPTURE_MAX_COUNT}\n",
        ports.http,
        storage.display().to_string()
    );
    let _ = writeln!(
        t,
        "[[source]]\nname = \"udp\"\nkind = \"udp\"\nlisten = \"{}\"\nchannels = {CHANNELS}\n\
         sample_rate_hz = {RATE_HZ}\nmax_datagram_bytes = {MAX_DATAGRAM}\n\
         reorder_window_s = 1.0\nmax_gap_s = 10.0\n",
        ports.udp
    );
    let _ = writeln!(
        t,
        "[[source]]\nname = \"tcp\"\nkind = \"tcp-listen\"\nlisten = \"{}\"\nchannels = {CHANNELS}\n\
         sample_rate_hz = {RATE_HZ}\nmax_frame_bytes = {MAX_FRAME}\n\
         on_second_connection = \"replace-silent\"\nreplace_after_silent_s = {REPLACE_AFTER_SILENT_S}\n\
         idle_timeout_s = {IDLE_TIMEOUT_S}\nreorder_window_s = 1.0\nmax_gap_s = 10.0\n",
        ports.tcp
    );
    for source in ["udp", "tcp"] {
        for c in 0..CHANNELS {
            let f = tone_hz(c);
            let _ = writeln!(
                t,
                "[[channel]]\nname = \"{}\"\nsource = \"{source}\"\nindex = {c}\nunit = \"g\"\n\
                 block = 4096\noverlap = 0.5\naveraging = {{ mode = \"linear\", count = 2 }}\n\
                 # The faults make many gaps a minute: health must not inhibit the alarms.\n\
                 health = {{ gaps = {{ max = 10000, window_s = 1.0 }} }}",
                channel_name(source, c)
            );
            if c == 0 {
                let _ = writeln!(
                    t,
                    "overall_alarm = {{ rms = {{ alert = {{ limit = {ALERT_G} }}, danger = {{ limit = {DANGER_G} }} }} }}"
                );
            }
            let _ = writeln!(
                t,
                "\n  [[channel.band]]\n  name = \"tone\"\n  lo_hz = {}\n  hi_hz = {}",
                f - 20.0,
                f + 20.0
            );
            if c == 1 {
                let _ = writeln!(
                    t,
                    "    [channel.band.alarm]\n    alert = {{ limit = {ALERT_G} }}\n    danger = {{ limit = {DANGER_G} }}"
                );
            }
            t.push('\n');
        }
    }
    t
}

#[cfg(test)]
#[allow(clippy::unwrap_used)] // tests may unwrap: a panic is a failed test
mod tests {
    use super::*;

    /// The written config is valid, with the sources and alarms the soak
    /// counts on.
    #[test]
    fn the_soak_config_parses() {
        let ports = Ports {
            http: "127.0.0.1:1".parse().unwrap(),
            udp: "127.0.0.1:2".parse().unwrap(),
            tcp: "127.0.0.1:3".parse().unwrap(),
        };
        let text = toml(&ports, Path::new("/tmp/soak-storage"));
        let c = crate::config::parse_str(&text).unwrap_or_else(|e| panic!("{e:?}\n{text}"));
        assert_eq!(c.sources.len(), 2);
        assert_eq!(c.channels.len(), 2 * CHANNELS);
    }
}
