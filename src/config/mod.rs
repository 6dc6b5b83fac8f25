//! Configuration, from the TOML file to the typed `Config` the pipeline
//! runs on. This file is the module map and the entry points (`load`,
//! `parse_str`); everything public is re-exported here, so `config::X`
//! names every type and function of the folder.
//!
//! | module | owns |
//! |---|---|
//! | `raw` | the file as serde reads it (`RawConfig`, `Raw*`; unknown keys rejected) |
//! | `kinds` | closed sets of choices (window, detrend, averaging, measure, spectrum, serial line, second connection) |
//! | `spec` | the validated specs (`Config`, `SourceSpec`, `ChannelSpec`, `BandSpec`, `MachineSpec`, ...) |
//! | `check` | `validate`: one small check per table, all adding to one issue list |
//! | `issue` | `ConfigIssue`, the one problem type (field path + why) |
//! | `alarms` | `[alarms]` and `alarm` tables, their checks and the alarm vocabulary |
//! | `health` | a channel's `health` table and its specs |
//! | `bearing` | bearing geometry and defect orders |
//! | `zones` | ISO 20816-3 zone presets (guidance) |
//! | `web` | the `[server] web_config` file (TLS, basic auth), checked down to the rustls server config |
//! | `environment` | `check`'s look at the machine: storage writable, token file private, devices present, listen addresses free |
//! | `fixture` | config text for tests and tools, built in code |
//!
//! The config layer sits at the bottom: it imports only `crate::units`,
//! `crate::frame` and its own modules.

use std::path::{Path, PathBuf};

pub mod alarms;
pub mod bearing;
mod check;
pub mod environment;
pub mod exposition;
pub mod fixture;
pub mod health;
pub mod history;
mod issue;
mod kinds;
mod raw;
mod spec;
pub mod web;
pub mod zones;

pub use check::{ring_bytes, validate, MAX_RING_BYTES_PER_CHANNEL, MAX_RING_BYTES_TOTAL};
pub use history::HistorySpec;
pub use issue::ConfigIssue;
pub use kinds::{
    AveragingMode, Detrend, FlowControl, Measure, Parity, SecondConnection, SpectrumKind,
    WindowKind,
};
pub use raw::{
    RawAveraging, RawBand, RawBearing, RawChannel, RawConfig, RawDsp, RawEnvelope, RawMachine,
    RawOverallAlarms, RawServer, RawSource, RawSpeed,
};
pub use spec::HttpLimits;
pub use spec::{
    AlarmTarget, Backoff, BandEdges, BandSpec, ChannelAlarm, ChannelSpec, Config, Framing,
    MachineSpec, SequenceSpec, SourceKind, SourceSpec, SpeedSource, StreamSpec, SIM_CHANNELS,
    SIM_SAMPLE_RATE_HZ,
};

#[derive(Debug, thiserror::Error)]
pub enum ConfigError {
    #[error("cannot read config {path}: {source}")]
    Io {
        path: PathBuf,
        #[source]
        source: std::io::Error,
    },
    #[error("config {path} is not valid TOML for bandwatch: {message}")]
    Parse { path: PathBuf, message: String },
    #[error("config {path} has {} problem(s):\n{}", issues.len(), issues.iter().map(|i| format!("  - {i}")).collect::<Vec<_>>().join("\n"))]
    Invalid {
        path: PathBuf,
        issues: Vec<ConfigIssue>,
    },
}

/// Reads, parses and validates a config file; relative paths resolve
/// against the file's directory (see [`load_with`]).
pub fn load(path: &Path) -> Result<Config, ConfigError> {
    load_with(path, None)
}

/// Reads, parses and validates a config file. Every relative file path in
/// it (`[server] web_config`, `[alarms] storage_dir` and `token_file`, a
/// serial source's `device`) resolves against the directory of the config
/// file, not the working directory; `state_dir` (`run --state-dir`,
/// `$STATE_DIRECTORY`), when given, is where a relative `storage_dir`
/// resolves instead. The one loader of `run`, `check` and `replay`.
pub fn load_with(path: &Path, state_dir: Option<&Path>) -> Result<Config, ConfigError> {
    let text = std::fs::read_to_string(path).map_err(|source| ConfigError::Io {
        path: path.to_path_buf(),
        source,
    })?;
    let mut raw: RawConfig = toml::from_str(&text).map_err(|e| ConfigError::Parse {
        path: path.to_path_buf(),
        message: e.to_string(),
    })?;
    resolve_paths(&mut raw, &config_dir(path), state_dir);
    validate(&raw).map_err(|issues| ConfigError::Invalid {
        path: path.to_path_buf(),
        issues,
    })
}

/// The directory a config file's relative paths resolve against: the
/// file's own, made absolute (the working directory joined when the path
/// is relative).
pub fn config_dir(path: &Path) -> PathBuf {
    let abs = std::path::absolute(path).unwrap_or_else(|_| path.to_path_buf());
    abs.parent()
        .map_or_else(|| PathBuf::from("."), Path::to_path_buf)
}

/// Makes every relative file path of `raw` absolute: against `dir` (the
/// config file's directory), or for `[alarms] storage_dir` against
/// `state_dir` when one is given. Empty paths stay empty, so validation
/// still names them.
pub fn resolve_paths(raw: &mut RawConfig, dir: &Path, state_dir: Option<&Path>) {
    fn against(base: &Path, p: &Path) -> PathBuf {
        if p.is_absolute() || p.as_os_str().is_empty() {
            p.to_path_buf()
        } else {
            base.join(p)
        }
    }
    if let Some(w) = raw.server.web_config.as_mut() {
        *w = against(dir, w);
    }
    if let Some(a) = raw.alarms.as_mut() {
        a.storage_dir = against(state_dir.unwrap_or(dir), &a.storage_dir);
        if let Some(t) = a.token_file.as_mut() {
            *t = against(dir, t);
        }
    }
    if let Some(f) = raw.history.as_mut().and_then(|h| h.file.as_mut()) {
        *f = against(state_dir.unwrap_or(dir), f);
    }
    for s in &mut raw.sources {
        if let RawSource::Serial { device, .. } = s {
            let p = against(dir, Path::new(device.as_str()));
            *device = p.to_string_lossy().into_owned();
        }
    }
}

/// Failure of [`parse_str`].
#[derive(Debug)]
pub enum ParseError {
    Toml(String),
    Invalid(Vec<ConfigIssue>),
}

/// Parses and validates config text as if it were a file in `dir`: its
/// relative paths resolve against `dir` (and a relative storage_dir
/// against `state_dir` when given), as [`load_with`] does.
pub fn parse_str_in(
    text: &str,
    dir: &Path,
    state_dir: Option<&Path>,
) -> Result<Config, ParseError> {
    let mut raw: RawConfig = toml::from_str(text).map_err(|e| ParseError::Toml(e.to_string()))?;
    let dir = std::path::absolute(dir).unwrap_or_else(|_| dir.to_path_buf());
    resolve_paths(&mut raw, &dir, state_dir);
    validate(&raw).map_err(ParseError::Invalid)
}

/// Parses and validates config text; relative paths stay as written
/// (relative to the working directory). Files use [`load_with`].
pub fn parse_str(text: &str) -> Result<Config, ParseError> {
    let raw: RawConfig = toml::from_str(text).map_err(|e| ParseError::Toml(e.to_string()))?;
    validate(&raw).map_err(ParseError::Invalid)
}

#[cfg(test)]
mod tests {
    use super::*;

    const GOOD: &str = r#"
[server]
listen = "127.0.0.1:0"

[[source]]
name = "sim"
kind = "sim"

[[channel]]
name = "a"
source = "sim"
index = 0
unit = "g"
block = 4096
nfft = 8192
window = "flat-top"
overlap = 0.75
averaging = { mode = "exponential", count = 8 }

[[channel.band]]
name = "v"
lo_hz = 10
hi_hz = 1000
unit = "mm/s"
"#;

    #[test]
    fn good_config_resolves() {
        let c = parse_str(GOOD).expect("valid");
        let ch = &c.channels[0];
        assert_eq!(ch.nfft, 8192);
        assert_eq!(ch.hop, 1024);
        assert_eq!(ch.bins(), 4097);
        assert_eq!(ch.bands[0].unit.symbol, "mm/s");
        assert_eq!(ch.window, WindowKind::FlatTop);
    }

    #[test]
    fn relative_paths_resolve_against_the_config_dir_or_the_state_dir() {
        let text = GOOD.replace(
            "[[source]]\nname = \"sim\"",
            "[alarms]\nstorage_dir = \"data\"\ntoken_file = \"tok\"\n\n[[source]]\nname = \"sim\"",
        );
        assert_ne!(text, GOOD);
        let c = parse_str_in(&text, Path::new("/etc/bw"), None).expect("valid");
        let a = c.alarms.expect("alarms");
        assert_eq!(a.storage_dir, Path::new("/etc/bw/data"));
        assert_eq!(
            a.token,
            Some(alarms::TokenSource::File("/etc/bw/tok".into()))
        );
        let c = parse_str_in(&text, Path::new("/etc/bw"), Some(Path::new("/var/lib/bw")))
            .expect("valid");
        let a = c.alarms.expect("alarms");
        assert_eq!(a.storage_dir, Path::new("/var/lib/bw/data"));
        assert_eq!(
            a.token,
            Some(alarms::TokenSource::File("/etc/bw/tok".into()))
        );
        // Absolute paths stay.
        let abs = text.replace("\"data\"", "\"/srv/d\"");
        let c = parse_str_in(&abs, Path::new("/etc/bw"), Some(Path::new("/x"))).expect("valid");
        assert_eq!(c.alarms.expect("alarms").storage_dir, Path::new("/srv/d"));
    }

    #[test]
    fn unknown_key_is_rejected() {
        let text = GOOD.replace("index = 0", "index = 0\ncolour = \"red\"");
        match parse_str(&text) {
            Err(ParseError::Toml(m)) => assert!(m.contains("colour"), "{m}"),
            other => panic!("expected a TOML error, got {other:?}"),
        }
    }
}
