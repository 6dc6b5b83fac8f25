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
//! | `fixture` | config text for tests and tools, built in code |
//!
//! The config layer sits at the bottom: it imports only `crate::units`,
//! `crate::frame` and its own modules.

use std::path::{Path, PathBuf};

pub mod alarms;
pub mod bearing;
mod check;
pub mod fixture;
pub mod health;
mod issue;
mod kinds;
mod raw;
mod spec;
pub mod web;
pub mod zones;

pub use check::{ring_bytes, validate, MAX_RING_BYTES_PER_CHANNEL, MAX_RING_BYTES_TOTAL};
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

/// Reads, parses and validates a config file.
pub fn load(path: &Path) -> Result<Config, ConfigError> {
    let text = std::fs::read_to_string(path).map_err(|source| ConfigError::Io {
        path: path.to_path_buf(),
        source,
    })?;
    parse_str(&text).map_err(|e| match e {
        ParseError::Toml(message) => ConfigError::Parse {
            path: path.to_path_buf(),
            message,
        },
        ParseError::Invalid(issues) => ConfigError::Invalid {
            path: path.to_path_buf(),
            issues,
        },
    })
}

/// Failure of [`parse_str`].
#[derive(Debug)]
pub enum ParseError {
    Toml(String),
    Invalid(Vec<ConfigIssue>),
}

/// Parses and validates config text.
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
    fn unknown_key_is_rejected() {
        let text = GOOD.replace("index = 0", "index = 0\ncolour = \"red\"");
        match parse_str(&text) {
            Err(ParseError::Toml(m)) => assert!(m.contains("colour"), "{m}"),
            other => panic!("expected a TOML error, got {other:?}"),
        }
    }
}
