//! The alarm tables of the config file: serde's `RawAlarms` (`[alarms]`:
//! storage, token, bounds) and `RawAlarm` (a band's or overall measure's
//! `alarm`), unknown keys rejected; their checks into `AlarmsSpec` and
//! `AlarmSpec`; and the alarm vocabulary the alarm stage runs on (limit
//! rule, direction, retention, journal limits, token source). Each problem
//! is a `ConfigIssue` under the path the caller passes (e.g.
//! `channel "pump-de" band "bpfo".alarm`). A channel's `health` table is in
//! `config::health`, re-exported here so `config::alarms::RawHealth` and the
//! health specs keep their paths.
//!
//! The tables, embedded by `crate::config`:
//!
//! ```toml
//! [alarms]                       # top level: storage, token, bounds
//! storage_dir = "/var/lib/bandwatch"
//! token_file = "/etc/bandwatch/token"   # or token_env = "BANDWATCH_TOKEN"
//!
//! [[channel]]
//! # ...
//! [channel.health]               # per channel: sensor "not OK" checks
//! flatline = { std_below = 0.0005, for_s = 2.0 }
//!
//! [[channel.band]]
//! # ...
//! [channel.band.alarm]           # per band or overall measure
//! latching = true
//! on_delay_s = 2.0
//! alert = { limit = 4.5 }
//! danger = { limit = 7.1, on_delay_s = 1.0 }
//! ```

use std::path::PathBuf;

use serde::{Deserialize, Serialize};

use super::issue::{ConfigIssue, Issues};
use super::zones::{MachineGroup, Support, ZonePreset};
use crate::units::{Quantity, Unit};

pub use super::health::{
    BiasSpec, ClippingSpec, FlatlineSpec, GapSpec, HealthSpec, RawBias, RawClipping, RawFlatline,
    RawGaps, RawHealth, RawStale, StaleSpec,
};

/// Longest on/off delay and recovery time, seconds.
pub(crate) const MAX_DELAY_S: f64 = 3600.0;

// ---------------------------------------------------------------------------
// [alarms]
// ---------------------------------------------------------------------------

/// `[alarms]`: where alarm records live and the bounds on them.
#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawAlarms {
    /// Directory for the journal, captures and baselines (created if
    /// missing): `journal/`, `captures/`, `baselines/` inside it.
    pub storage_dir: PathBuf,
    /// File whose first line is the bearer token for operator actions.
    pub token_file: Option<PathBuf>,
    /// Environment variable holding the token (instead of `token_file`).
    pub token_env: Option<String>,
    /// Let `run` use a token file that group or others may read (the
    /// demo's, checked out 0644). Off: such a file is refused.
    #[serde(default)]
    pub token_file_insecure_ok: bool,
    /// Size at which the journal file rotates, bytes.
    #[serde(default = "default_journal_max_bytes")]
    pub journal_max_bytes: u64,
    /// Journal files kept, the active one included.
    #[serde(default = "default_journal_max_files")]
    pub journal_max_files: u32,
    /// Seconds of waveform kept before a trip.
    #[serde(default = "default_capture_s")]
    pub capture_pre_s: f64,
    /// Seconds of waveform recorded after a trip.
    #[serde(default = "default_capture_s")]
    pub capture_post_s: f64,
    /// Captures kept; the oldest go first.
    #[serde(default = "default_capture_max_count")]
    pub capture_max_count: usize,
    /// Total size of the captures kept, bytes.
    #[serde(default = "default_capture_max_bytes")]
    pub capture_max_bytes: u64,
}

fn default_journal_max_bytes() -> u64 {
    4 << 20
}
fn default_journal_max_files() -> u32 {
    8
}
fn default_capture_s() -> f64 {
    5.0
}
fn default_capture_max_count() -> usize {
    100
}
fn default_capture_max_bytes() -> u64 {
    512 << 20
}

/// `[alarms]` validated.
#[derive(Debug, Clone, PartialEq)]
pub struct AlarmsSpec {
    pub storage_dir: PathBuf,
    /// `None`: no token configured, every operator action is refused.
    pub token: Option<TokenSource>,
    /// `[alarms] token_file_insecure_ok`: a token file readable by group
    /// or others is accepted.
    pub token_file_insecure_ok: bool,
    pub journal: JournalLimits,
    pub capture_pre_s: f64,
    pub capture_post_s: f64,
    pub retention: Retention,
}

impl AlarmsSpec {
    pub fn journal_dir(&self) -> PathBuf {
        self.storage_dir.join("journal")
    }
    pub fn captures_dir(&self) -> PathBuf {
        self.storage_dir.join("captures")
    }
    pub fn baselines_dir(&self) -> PathBuf {
        self.storage_dir.join("baselines")
    }
}

impl RawAlarms {
    /// Every problem of the table; `path` is e.g. `"alarms"`.
    pub fn validate(&self, path: &str) -> Vec<ConfigIssue> {
        self.build(path).err().unwrap_or_default()
    }

    /// The validated spec.
    ///
    /// # Errors
    /// Every problem found, each with its field path.
    pub fn build(&self, path: &str) -> Result<AlarmsSpec, Vec<ConfigIssue>> {
        let mut out = Issues::default();
        if self.storage_dir.as_os_str().is_empty() {
            out.add(format!("{path}.storage_dir"), "must not be empty");
        }
        let token = match (&self.token_file, &self.token_env) {
            (Some(_), Some(_)) => {
                out.add(
                    format!("{path}.token_file"),
                    "give token_file or token_env, not both",
                );
                None
            }
            (Some(f), None) => Some(TokenSource::File(f.clone())),
            (None, Some(v)) => {
                if v.is_empty() || v.contains('=') || v.contains('\0') {
                    out.add(
                        format!("{path}.token_env"),
                        format!("{v:?} is not a valid environment variable name"),
                    );
                }
                Some(TokenSource::Env(v.clone()))
            }
            (None, None) => None,
        };
        if !(4096..=1 << 30).contains(&self.journal_max_bytes) {
            out.add(
                format!("{path}.journal_max_bytes"),
                format!(
                    "{} is out of range 4096 to 1073741824",
                    self.journal_max_bytes
                ),
            );
        }
        if !(2..=100).contains(&self.journal_max_files) {
            out.add(
                format!("{path}.journal_max_files"),
                format!("{} is out of range 2 to 100", self.journal_max_files),
            );
        }
        out.check_range(
            format!("{path}.capture_pre_s"),
            self.capture_pre_s,
            0.0,
            60.0,
        );
        out.check_range(
            format!("{path}.capture_post_s"),
            self.capture_post_s,
            0.0,
            60.0,
        );
        if !(1..=100_000).contains(&self.capture_max_count) {
            out.add(
                format!("{path}.capture_max_count"),
                format!("{} is out of range 1 to 100000", self.capture_max_count),
            );
        }
        if self.capture_max_bytes < 1 << 20 {
            out.add(
                format!("{path}.capture_max_bytes"),
                format!("{} is below 1048576 (1 MiB)", self.capture_max_bytes),
            );
        }
        if !out.is_empty() {
            return Err(out.into_vec());
        }
        Ok(AlarmsSpec {
            storage_dir: self.storage_dir.clone(),
            token,
            token_file_insecure_ok: self.token_file_insecure_ok,
            journal: JournalLimits {
                max_bytes: self.journal_max_bytes,
                max_files: self.journal_max_files,
            },
            capture_pre_s: self.capture_pre_s,
            capture_post_s: self.capture_post_s,
            retention: Retention {
                max_count: self.capture_max_count,
                max_bytes: self.capture_max_bytes,
            },
        })
    }
}

// ---------------------------------------------------------------------------
// a band's `alarm`
// ---------------------------------------------------------------------------

/// A band's (or overall measure's) `alarm` table.
#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawAlarm {
    /// Hold the highest state until acknowledged.
    #[serde(default)]
    pub latching: bool,
    /// Direction of both levels unless a level sets its own.
    #[serde(default)]
    pub direction: Direction,
    /// Deadband on the way back (band unit) for both levels unless a level
    /// sets its own.
    #[serde(default)]
    pub hysteresis: f64,
    /// Seconds the condition must hold before a level trips.
    #[serde(default)]
    pub on_delay_s: f64,
    /// Seconds the condition must be gone before a level clears.
    #[serde(default)]
    pub off_delay_s: f64,
    pub alert: Option<RawLevel>,
    pub danger: Option<RawLevel>,
    /// Learn the band's normal level; levels then give `factor` or `sigma`.
    pub baseline: Option<RawBaseline>,
    /// Use the ISO 20816-3 zone boundaries [mem] as guidance limits:
    /// alert = B/C, danger = C/D. For overall velocity RMS bands only.
    pub zone: Option<RawZone>,
}

/// One level: exactly one of `limit`, `factor`, `sigma` (none with `zone`).
#[derive(Debug, Clone, Default, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawLevel {
    /// Fixed limit, band unit.
    pub limit: Option<f64>,
    /// Limit = baseline mean × factor.
    pub factor: Option<f64>,
    /// Limit = baseline mean ± sigma × σ (+ for high, − for low).
    pub sigma: Option<f64>,
    pub direction: Option<Direction>,
    pub hysteresis: Option<f64>,
    pub on_delay_s: Option<f64>,
    pub off_delay_s: Option<f64>,
}

#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawBaseline {
    /// Seconds of healthy running to learn from.
    pub learn_s: f64,
}

#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawZone {
    /// Machine group: 1 (300 kW to 50 MW) or 2 (15 kW to 300 kW) [mem].
    pub group: u8,
    /// "rigid" or "flexible".
    pub support: Support,
}

/// Where a level's limit comes from.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum LimitSource {
    Fixed(f64),
    Baseline(LimitRule),
    /// alert = B/C, danger = C/D of the preset.
    Zone,
}

/// One level validated.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct LevelConfig {
    pub source: LimitSource,
    pub direction: Direction,
    pub hysteresis: f64,
    pub on_delay_s: f64,
    pub off_delay_s: f64,
}

/// A band's alarm validated.
#[derive(Debug, Clone, PartialEq)]
pub struct AlarmSpec {
    pub latching: bool,
    pub alert: Option<LevelConfig>,
    pub danger: Option<LevelConfig>,
    /// Seconds to learn, when a level uses the baseline.
    pub baseline_learn_s: Option<f64>,
    pub zone: Option<ZonePreset>,
}

impl AlarmSpec {
    /// Whether a level needs a learned baseline.
    pub fn uses_baseline(&self) -> bool {
        self.baseline_learn_s.is_some()
    }

    /// Checks that a zone preset sits on a band it fits: a velocity unit and
    /// the RMS measure (the zones are for broadband velocity RMS).
    pub fn check_band(&self, path: &str, unit: Unit, measure_is_rms: bool) -> Vec<ConfigIssue> {
        let mut out = Issues::default();
        if self.zone.is_some() {
            if unit.quantity != Quantity::Velocity {
                out.add(
                    format!("{path}.zone"),
                    format!(
                        "zone presets are for velocity bands; this band is in {} ({})",
                        unit.symbol,
                        unit.quantity.as_str()
                    ),
                );
            }
            if !measure_is_rms {
                out.add(
                    format!("{path}.zone"),
                    "zone presets are for the rms measure",
                );
            }
        }
        out.into_vec()
    }
}

impl RawAlarm {
    /// Every problem of the table.
    pub fn validate(&self, path: &str) -> Vec<ConfigIssue> {
        self.build(path).err().unwrap_or_default()
    }

    /// The validated spec.
    ///
    /// # Errors
    /// Every problem found, each with its field path.
    pub fn build(&self, path: &str) -> Result<AlarmSpec, Vec<ConfigIssue>> {
        let mut out = Issues::default();
        out.check_range(format!("{path}.hysteresis"), self.hysteresis, 0.0, f64::MAX);
        out.check_range(
            format!("{path}.on_delay_s"),
            self.on_delay_s,
            0.0,
            MAX_DELAY_S,
        );
        out.check_range(
            format!("{path}.off_delay_s"),
            self.off_delay_s,
            0.0,
            MAX_DELAY_S,
        );

        let zone = self
            .zone
            .as_ref()
            .and_then(|z| match MachineGroup::from_number(z.group) {
                Some(group) => Some(ZonePreset {
                    group,
                    support: z.support,
                }),
                None => {
                    out.add(
                        format!("{path}.zone.group"),
                        format!("{} is not a machine group (1 or 2)", z.group),
                    );
                    None
                }
            });
        let baseline_learn_s = self.baseline.as_ref().map(|b| {
            out.check_range(
                format!("{path}.baseline.learn_s"),
                b.learn_s,
                1.0,
                30.0 * 86400.0,
            );
            b.learn_s
        });
        if self.zone.is_some() && self.baseline.is_some() {
            out.add(format!("{path}.zone"), "give zone or baseline, not both");
        }

        let zone_on = self.zone.is_some();
        let empty = RawLevel::default();
        let mut level = |name: &str, raw: Option<&RawLevel>| -> Option<LevelConfig> {
            let raw = match (raw, zone_on) {
                (Some(r), _) => r,
                (None, true) => &empty,
                (None, false) => return None,
            };
            let p = format!("{path}.{name}");
            let direction = raw.direction.unwrap_or(self.direction);
            let hysteresis = raw.hysteresis.unwrap_or(self.hysteresis);
            let on = raw.on_delay_s.unwrap_or(self.on_delay_s);
            let off = raw.off_delay_s.unwrap_or(self.off_delay_s);
            if raw.hysteresis.is_some() {
                out.check_range(format!("{p}.hysteresis"), hysteresis, 0.0, f64::MAX);
            }
            if raw.on_delay_s.is_some() {
                out.check_range(format!("{p}.on_delay_s"), on, 0.0, MAX_DELAY_S);
            }
            if raw.off_delay_s.is_some() {
                out.check_range(format!("{p}.off_delay_s"), off, 0.0, MAX_DELAY_S);
            }
            let given = [
                raw.limit.is_some(),
                raw.factor.is_some(),
                raw.sigma.is_some(),
            ]
            .iter()
            .filter(|x| **x)
            .count();
            let source = if zone_on {
                if given > 0 {
                    out.add(format!("{p}.limit"),
                        "with zone the limits come from the preset: leave out limit, factor and sigma",
                    );
                }
                if direction != Direction::High {
                    out.add(format!("{p}.direction"), "zone limits are high limits");
                }
                LimitSource::Zone
            } else if given != 1 {
                out.add(p.clone(),
                    "give exactly one of limit, factor (× baseline mean) or sigma (baseline mean ± k·σ)",
                );
                LimitSource::Fixed(0.0)
            } else if let Some(l) = raw.limit {
                if !l.is_finite() {
                    out.add(format!("{p}.limit"), format!("{l} is not a finite number"));
                }
                LimitSource::Fixed(l)
            } else {
                if self.baseline.is_none() {
                    out.add(p.clone(),
                        "factor and sigma need a baseline table (e.g. baseline = { learn_s = 3600 })",
                    );
                }
                if let Some(f) = raw.factor {
                    if !(f.is_finite() && f > 0.0) {
                        out.add(format!("{p}.factor"), format!("{f} must be > 0"));
                    }
                    LimitSource::Baseline(LimitRule::Factor(f))
                } else {
                    let k = raw.sigma.unwrap_or(0.0);
                    if !(k.is_finite() && k > 0.0) {
                        out.add(format!("{p}.sigma"), format!("{k} must be > 0"));
                    }
                    LimitSource::Baseline(LimitRule::Sigma(k))
                }
            };
            Some(LevelConfig {
                source,
                direction,
                hysteresis,
                on_delay_s: on,
                off_delay_s: off,
            })
        };
        let alert = level("alert", self.alert.as_ref());
        let danger = level("danger", self.danger.as_ref());

        if alert.is_none() && danger.is_none() {
            out.add(
                path.to_string(),
                "an alarm needs an alert or a danger level (or a zone preset)",
            );
        }
        if let (Some(a), Some(d)) = (&alert, &danger) {
            use LimitRule::{Factor, Sigma};
            use LimitSource::{Baseline as B, Fixed};
            let wrong = match (a.source, d.source, a.direction == d.direction) {
                (_, _, false) => None,
                (Fixed(x), Fixed(y), true) | (B(Factor(x)), B(Factor(y)), true) => {
                    Some(match a.direction {
                        Direction::High => (y <= x, x, y),
                        Direction::Low => (y >= x, x, y),
                    })
                }
                // mean ± k·σ: danger needs the larger k either way.
                (B(Sigma(x)), B(Sigma(y)), true) => Some((y <= x, x, y)),
                _ => None,
            };
            if let Some((true, x, y)) = wrong {
                out.add(
                    format!("{path}.danger"),
                    format!(
                        "danger ({y}) must be beyond alert ({x}) for {} limits",
                        a.direction.as_str()
                    ),
                );
            }
        }
        if !out.is_empty() {
            return Err(out.into_vec());
        }
        Ok(AlarmSpec {
            latching: self.latching,
            alert,
            danger,
            baseline_learn_s: if self.baseline.is_some() {
                baseline_learn_s
            } else {
                None
            },
            zone,
        })
    }
}

// ---------------------------------------------------------------------------
// Vocabulary the alarm stage runs on
// ---------------------------------------------------------------------------

/// How a limit follows from a baseline.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum LimitRule {
    /// `mean × factor`.
    Factor(f64),
    /// `mean + k·σ` for a high level, `mean − k·σ` for a low one.
    Sigma(f64),
}

/// Which side of the limit is abnormal.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum Direction {
    /// At or above the limit is abnormal (the usual case for vibration).
    #[default]
    High,
    /// At or below the limit is abnormal (e.g. a lost signal, low pressure).
    Low,
}

impl Direction {
    pub fn as_str(self) -> &'static str {
        match self {
            Direction::High => "high",
            Direction::Low => "low",
        }
    }
}

/// Retention bounds of the capture directory.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
pub struct Retention {
    pub max_count: usize,
    pub max_bytes: u64,
}

/// Journal bounds.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
pub struct JournalLimits {
    /// Largest size of one file, bytes (a single larger event still goes in).
    pub max_bytes: u64,
    /// Files kept in all, the active one included, >= 2.
    pub max_files: u32,
}

impl Default for JournalLimits {
    fn default() -> JournalLimits {
        JournalLimits {
            max_bytes: 4 << 20,
            max_files: 8,
        }
    }
}

/// Where the token comes from.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum TokenSource {
    File(PathBuf),
    Env(String),
}
