//! What every bench rig is built from: the bench's config text (the demo's
//! bands, alarms and sensor checks on every channel) and its test signal.
//! The rigs assemble their pipelines from this config with
//! `pipeline::Builder`, as the daemon does.

use crate::config::{parse_str, Config};

use super::{BenchError, FS, G_PER_COUNT, OVERLAP};

/// Config text for `channels` channels of one source, with the demo's
/// motor-de bands (velocity bands integrate, one band stays in g); `scale`
/// is each channel's `scale` (g per count of the frames its source gets).
pub(crate) fn config_text(
    channels: usize,
    n: usize,
    fs: f64,
    source: &str,
    averages: u32,
    scale: f64,
) -> String {
    // The journal of the running pipeline (ingest phase) goes to a scratch
    // directory; the rigs driven by hand write nothing.
    let storage = std::env::temp_dir()
        .join(format!("bandwatch-bench-{}", std::process::id()))
        .display()
        .to_string();
    let mut t = format!(
        "[server]\nlisten = \"127.0.0.1:0\"\n[dsp]\nworkers = 2\n[alarms]\nstorage_dir = {storage:?}\n\n[[source]]\nname = \"bench\"\n{source}\nchannels = {channels}\nsample_rate_hz = {fs:?}\n"
    );
    for c in 0..channels {
        t.push('\n');
        t.push_str(&channel_text(c, "bench", c, n, fs, averages, scale));
    }
    t
}

/// One `[[channel]]` table: channel `ch{number:04}` at `index` of
/// `source`, block `n`, the demo's motor-de bands (velocity bands
/// integrate, one band stays in g), its sensor checks and alarms: a zone
/// preset on the overall velocity, fixed limits on the high-frequency band
/// and on the overall RMS. The channels of every rig but `http` are made
/// here.
pub(crate) fn channel_text(
    number: usize,
    source: &str,
    index: usize,
    n: usize,
    fs: f64,
    averages: u32,
    scale: f64,
) -> String {
    // Bands scale with the sample rate so that, at any rate, they hold the
    // same lines (the ingest phase raises the rate instead of the channels).
    let k = fs / FS;
    let band = |name: &str, lo: f64, hi: f64, unit: &str, measure: &str, alarm: &str| {
        format!(
            "[[channel.band]]\nname = \"{name}\"\nlo_hz = {:?}\nhi_hz = {:?}\nunit = \"{unit}\"\nmeasure = \"{measure}\"\n{alarm}",
            lo * k,
            hi * k
        )
    };
    // Alarms as the demo sets them: a zone preset on the overall velocity,
    // fixed limits on the high-frequency acceleration (set well above the
    // test signal, so they are evaluated on every spectrum and never trip).
    let zone = "alarm = { zone = { group = 2, support = \"rigid\" }, hysteresis = 0.1, on_delay_s = 3.0 }\n";
    let limits =
        "alarm = { alert = { limit = 5.0 }, danger = { limit = 10.0 }, on_delay_s = 2.0 }\n";
    let bands = [
        band("overall-velocity", 10.0, 1000.0, "mm/s", "rms", zone),
        band("1x", 21.0, 28.5, "mm/s", "rms", ""),
        band("2x", 45.0, 54.0, "mm/s", "rms", ""),
        band("acceleration-hf", 1000.0, 10000.0, "g", "rms", limits),
        band("1x-peak", 21.0, 28.5, "g", "peak", ""),
    ]
    .concat();
    // The demo's sensor checks (flatline, clipping) and overall alarm.
    let checks = "health = { flatline = { std_below = 0.0001, for_s = 2.0 }, clipping = { full_scale = 50.0 } }\n\
                  overall_alarm = { rms = { alert = { limit = 5.0 }, danger = { limit = 10.0 }, on_delay_s = 2.0 } }\n";
    format!(
        "[[channel]]\nname = \"ch{number:04}\"\nsource = \"{source}\"\nindex = {index}\nunit = \"g\"\n\
         scale = {scale:?}\nblock = {n}\nwindow = \"hann\"\noverlap = {OVERLAP:?}\n\
         averaging = {{ mode = \"linear\", count = {averages} }}\nintegration_low_cut_hz = 5.0\n{checks}{bands}"
    )
}

/// The config of `channels` channels of the converter's counts, 4 averages.
pub(crate) fn bench_config(
    channels: usize,
    n: usize,
    fs: f64,
    source: &str,
) -> Result<Config, BenchError> {
    parse_config(&config_text(channels, n, fs, source, 4, G_PER_COUNT))
}

/// Parses and validates bench config text.
pub(crate) fn parse_config(text: &str) -> Result<Config, BenchError> {
    parse_str(text).map_err(|e| BenchError::Config(format!("{e:?}")))
}

/// A source the rigs never open (they feed the rings or the sink by hand).
pub(crate) const UNUSED_SOURCE: &str = "kind = \"tcp-listen\"\nlisten = \"127.0.0.1:0\"";

/// A pump-like test signal in g: 1×, vane pass, a resonance burst train and
/// noise from a fixed-seed generator. Only its magnitude matters here (no
/// denormals, no overflow of i16/i24 counts).
pub(crate) fn test_signal(len: usize, fs: f64) -> Vec<f32> {
    let mut s: u64 = 0x2545_F491_4F6C_DD1D;
    let tau = 2.0 * std::f64::consts::PI;
    (0..len)
        .map(|i| {
            s ^= s << 13;
            s ^= s >> 7;
            s ^= s << 17;
            let noise = ((s >> 11) as f64 / (1u64 << 53) as f64 - 0.5) * 0.05;
            let t = i as f64 / fs;
            let v = 0.30 * (tau * 24.75 * t).sin()
                + 0.05 * (tau * 173.25 * t).sin()
                + 0.02 * (tau * 3200.0 * t).sin() * (tau * 89.1 * t).sin().max(0.0)
                + noise;
            v as f32
        })
        .collect()
}

/// Where channel `c`'s samples start in the shared test signal, so that
/// channels differ.
pub(crate) fn signal_offset(c: usize, pos: u64, len: usize, chunk: usize) -> usize {
    ((pos as usize).wrapping_add(c.wrapping_mul(7919))) % (len - chunk)
}
