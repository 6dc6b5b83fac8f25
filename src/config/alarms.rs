//! The alarm tables of the config file, as serde reads them (unknown keys
//! rejected), and their validation into typed specs. Every problem is a
//! `(field path, message)` pair; `path` is the prefix the caller passes
//! (e.g. `channel "pump-de" band "bpfo".alarm`).
//!
//! Three tables, embedded by `crate::config`:
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

use crate::config::zones::{MachineGroup, Support, ZonePreset};
use crate::units::{Quantity, Unit};

/// A config problem: (field path, why).
pub type Issue = (String, String);

const MAX_DELAY_S: f64 = 3600.0;

fn issue(out: &mut Vec<Issue>, path: impl Into<String>, msg: impl Into<String>) {
    out.push((path.into(), msg.into()));
}

fn check_range(out: &mut Vec<Issue>, path: String, v: f64, lo: f64, hi: f64) {
    if !(v.is_finite() && v >= lo && v <= hi) {
        issue(out, path, format!("{v} is out of range {lo} to {hi}"));
    }
}

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
    pub fn validate(&self, path: &str) -> Vec<Issue> {
        self.build(path).err().unwrap_or_default()
    }

    /// The validated spec.
    ///
    /// # Errors
    /// Every problem found, each with its field path.
    pub fn build(&self, path: &str) -> Result<AlarmsSpec, Vec<Issue>> {
        let mut out = Vec::new();
        if self.storage_dir.as_os_str().is_empty() {
            issue(&mut out, format!("{path}.storage_dir"), "must not be empty");
        }
        let token = match (&self.token_file, &self.token_env) {
            (Some(_), Some(_)) => {
                issue(
                    &mut out,
                    format!("{path}.token_file"),
                    "give token_file or token_env, not both",
                );
                None
            }
            (Some(f), None) => Some(TokenSource::File(f.clone())),
            (None, Some(v)) => {
                if v.is_empty() || v.contains('=') || v.contains('\0') {
                    issue(
                        &mut out,
                        format!("{path}.token_env"),
                        format!("{v:?} is not a valid environment variable name"),
                    );
                }
                Some(TokenSource::Env(v.clone()))
            }
            (None, None) => None,
        };
        if !(4096..=1 << 30).contains(&self.journal_max_bytes) {
            issue(
                &mut out,
                format!("{path}.journal_max_bytes"),
                format!(
                    "{} is out of range 4096 to 1073741824",
                    self.journal_max_bytes
                ),
            );
        }
        if !(2..=100).contains(&self.journal_max_files) {
            issue(
                &mut out,
                format!("{path}.journal_max_files"),
                format!("{} is out of range 2 to 100", self.journal_max_files),
            );
        }
        check_range(
            &mut out,
            format!("{path}.capture_pre_s"),
            self.capture_pre_s,
            0.0,
            60.0,
        );
        check_range(
            &mut out,
            format!("{path}.capture_post_s"),
            self.capture_post_s,
            0.0,
            60.0,
        );
        if !(1..=100_000).contains(&self.capture_max_count) {
            issue(
                &mut out,
                format!("{path}.capture_max_count"),
                format!("{} is out of range 1 to 100000", self.capture_max_count),
            );
        }
        if self.capture_max_bytes < 1 << 20 {
            issue(
                &mut out,
                format!("{path}.capture_max_bytes"),
                format!("{} is below 1048576 (1 MiB)", self.capture_max_bytes),
            );
        }
        if !out.is_empty() {
            return Err(out);
        }
        Ok(AlarmsSpec {
            storage_dir: self.storage_dir.clone(),
            token,
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
    pub fn check_band(&self, path: &str, unit: Unit, measure_is_rms: bool) -> Vec<Issue> {
        let mut out = Vec::new();
        if self.zone.is_some() {
            if unit.quantity != Quantity::Velocity {
                issue(
                    &mut out,
                    format!("{path}.zone"),
                    format!(
                        "zone presets are for velocity bands; this band is in {} ({})",
                        unit.symbol,
                        unit.quantity.as_str()
                    ),
                );
            }
            if !measure_is_rms {
                issue(
                    &mut out,
                    format!("{path}.zone"),
                    "zone presets are for the rms measure",
                );
            }
        }
        out
    }
}

impl RawAlarm {
    /// Every problem of the table.
    pub fn validate(&self, path: &str) -> Vec<Issue> {
        self.build(path).err().unwrap_or_default()
    }

    /// The validated spec.
    ///
    /// # Errors
    /// Every problem found, each with its field path.
    pub fn build(&self, path: &str) -> Result<AlarmSpec, Vec<Issue>> {
        let mut out = Vec::new();
        check_range(
            &mut out,
            format!("{path}.hysteresis"),
            self.hysteresis,
            0.0,
            f64::MAX,
        );
        check_range(
            &mut out,
            format!("{path}.on_delay_s"),
            self.on_delay_s,
            0.0,
            MAX_DELAY_S,
        );
        check_range(
            &mut out,
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
                    issue(
                        &mut out,
                        format!("{path}.zone.group"),
                        format!("{} is not a machine group (1 or 2)", z.group),
                    );
                    None
                }
            });
        let baseline_learn_s = self.baseline.as_ref().map(|b| {
            check_range(
                &mut out,
                format!("{path}.baseline.learn_s"),
                b.learn_s,
                1.0,
                30.0 * 86400.0,
            );
            b.learn_s
        });
        if self.zone.is_some() && self.baseline.is_some() {
            issue(
                &mut out,
                format!("{path}.zone"),
                "give zone or baseline, not both",
            );
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
                check_range(
                    &mut out,
                    format!("{p}.hysteresis"),
                    hysteresis,
                    0.0,
                    f64::MAX,
                );
            }
            if raw.on_delay_s.is_some() {
                check_range(&mut out, format!("{p}.on_delay_s"), on, 0.0, MAX_DELAY_S);
            }
            if raw.off_delay_s.is_some() {
                check_range(&mut out, format!("{p}.off_delay_s"), off, 0.0, MAX_DELAY_S);
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
                    issue(
                        &mut out,
                        format!("{p}.limit"),
                        "with zone the limits come from the preset: leave out limit, factor and sigma",
                    );
                }
                if direction != Direction::High {
                    issue(
                        &mut out,
                        format!("{p}.direction"),
                        "zone limits are high limits",
                    );
                }
                LimitSource::Zone
            } else if given != 1 {
                issue(
                    &mut out,
                    p.clone(),
                    "give exactly one of limit, factor (× baseline mean) or sigma (baseline mean ± k·σ)",
                );
                LimitSource::Fixed(0.0)
            } else if let Some(l) = raw.limit {
                if !l.is_finite() {
                    issue(
                        &mut out,
                        format!("{p}.limit"),
                        format!("{l} is not a finite number"),
                    );
                }
                LimitSource::Fixed(l)
            } else {
                if self.baseline.is_none() {
                    issue(
                        &mut out,
                        p.clone(),
                        "factor and sigma need a baseline table (e.g. baseline = { learn_s = 3600 })",
                    );
                }
                if let Some(f) = raw.factor {
                    if !(f.is_finite() && f > 0.0) {
                        issue(&mut out, format!("{p}.factor"), format!("{f} must be > 0"));
                    }
                    LimitSource::Baseline(LimitRule::Factor(f))
                } else {
                    let k = raw.sigma.unwrap_or(0.0);
                    if !(k.is_finite() && k > 0.0) {
                        issue(&mut out, format!("{p}.sigma"), format!("{k} must be > 0"));
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
            issue(
                &mut out,
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
                issue(
                    &mut out,
                    format!("{path}.danger"),
                    format!(
                        "danger ({y}) must be beyond alert ({x}) for {} limits",
                        a.direction.as_str()
                    ),
                );
            }
        }
        if !out.is_empty() {
            return Err(out);
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
// a channel's `health`
// ---------------------------------------------------------------------------

/// A channel's `health` table. Stale and gap checks are on by default
/// (5 s; more than 10 gaps in 60 s); the others need the sensor's figures.
#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawHealth {
    /// Seconds without any fault before the channel is OK again. Must be at
    /// least `flatline.for_s`, so that a sensor dead at start-up is found
    /// before its alarms are enabled.
    #[serde(default = "default_recover_s")]
    pub recover_s: f64,
    pub flatline: Option<RawFlatline>,
    pub clipping: Option<RawClipping>,
    pub bias: Option<RawBias>,
    pub stale: Option<RawStale>,
    pub gaps: Option<RawGaps>,
}

fn default_recover_s() -> f64 {
    5.0
}

#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawFlatline {
    /// Standard deviation (channel unit) below which the signal is flat;
    /// about one converter step is common practice.
    pub std_below: f64,
    #[serde(default = "default_flat_for_s")]
    pub for_s: f64,
}

fn default_flat_for_s() -> f64 {
    1.0
}

#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawClipping {
    /// Converter full scale in the channel's unit.
    pub full_scale: f64,
    #[serde(default = "default_clip_fraction")]
    pub fraction: f64,
    /// Clipped samples within 0.1 s that make a fault.
    #[serde(default = "default_clip_samples")]
    pub samples: usize,
}

fn default_clip_fraction() -> f64 {
    0.99
}
fn default_clip_samples() -> usize {
    3
}

#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawBias {
    /// Lowest acceptable mean, channel unit.
    pub lo: f64,
    /// Highest acceptable mean, channel unit.
    pub hi: f64,
}

#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawStale {
    pub after_s: f64,
}

#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawGaps {
    pub max: u32,
    pub window_s: f64,
}

impl RawHealth {
    /// Every problem of the table.
    pub fn validate(&self, path: &str) -> Vec<Issue> {
        self.build(path).err().unwrap_or_default()
    }

    /// The validated spec.
    ///
    /// # Errors
    /// Every problem found, each with its field path.
    pub fn build(&self, path: &str) -> Result<HealthSpec, Vec<Issue>> {
        let mut out = Vec::new();
        let d = HealthSpec::default();
        check_range(
            &mut out,
            format!("{path}.recover_s"),
            self.recover_s,
            0.0,
            MAX_DELAY_S,
        );
        let flatline = self.flatline.as_ref().map(|f| {
            if !(f.std_below.is_finite() && f.std_below > 0.0) {
                issue(
                    &mut out,
                    format!("{path}.flatline.std_below"),
                    format!("{} must be > 0", f.std_below),
                );
            }
            check_range(&mut out, format!("{path}.flatline.for_s"), f.for_s, 0.1, MAX_DELAY_S);
            if f.for_s.is_finite() && self.recover_s < f.for_s {
                issue(
                    &mut out,
                    format!("{path}.recover_s"),
                    format!(
                        "{} is below flatline.for_s {}: a sensor dead at start-up would be trusted before it can be found flat",
                        self.recover_s, f.for_s
                    ),
                );
            }
            FlatlineSpec {
                std_below: f.std_below,
                for_s: f.for_s,
            }
        });
        let clipping = self.clipping.as_ref().map(|c| {
            if !(c.full_scale.is_finite() && c.full_scale > 0.0) {
                issue(
                    &mut out,
                    format!("{path}.clipping.full_scale"),
                    format!("{} must be > 0", c.full_scale),
                );
            }
            if !(c.fraction.is_finite() && c.fraction > 0.0 && c.fraction <= 1.0) {
                issue(
                    &mut out,
                    format!("{path}.clipping.fraction"),
                    format!("{} is out of range (0, 1]", c.fraction),
                );
            }
            if !(1..=1_000_000).contains(&c.samples) {
                issue(
                    &mut out,
                    format!("{path}.clipping.samples"),
                    format!("{} is out of range 1 to 1000000", c.samples),
                );
            }
            ClippingSpec {
                full_scale: c.full_scale,
                fraction: c.fraction,
                samples: c.samples,
            }
        });
        let bias = self.bias.as_ref().map(|b| {
            if !(b.lo.is_finite() && b.hi.is_finite() && b.lo < b.hi) {
                issue(
                    &mut out,
                    format!("{path}.bias"),
                    format!("lo {} must be below hi {} (both finite)", b.lo, b.hi),
                );
            }
            BiasSpec { lo: b.lo, hi: b.hi }
        });
        let stale = match &self.stale {
            Some(s) => {
                check_range(
                    &mut out,
                    format!("{path}.stale.after_s"),
                    s.after_s,
                    0.1,
                    MAX_DELAY_S,
                );
                Some(StaleSpec { after_s: s.after_s })
            }
            None => d.stale,
        };
        let gaps = match &self.gaps {
            Some(g) => {
                if g.max > 10_000 {
                    issue(
                        &mut out,
                        format!("{path}.gaps.max"),
                        format!("{} is out of range 0 to 10000", g.max),
                    );
                }
                check_range(
                    &mut out,
                    format!("{path}.gaps.window_s"),
                    g.window_s,
                    0.1,
                    86400.0,
                );
                Some(GapSpec {
                    max: g.max,
                    window_s: g.window_s,
                })
            }
            None => d.gaps,
        };
        if !out.is_empty() {
            return Err(out);
        }
        Ok(HealthSpec {
            flatline,
            clipping,
            bias,
            stale,
            gaps,
            recover_s: self.recover_s,
        })
    }
}

// ---------------------------------------------------------------------------
// Channel health checks (validated)
// ---------------------------------------------------------------------------

#[derive(Debug, Clone, Copy, PartialEq, serde::Serialize)]
pub struct FlatlineSpec {
    /// Standard deviation (channel unit) under which a window is flat.
    pub std_below: f64,
    /// Seconds of flat windows before the channel is not OK.
    pub for_s: f64,
}

#[derive(Debug, Clone, Copy, PartialEq, serde::Serialize)]
pub struct ClippingSpec {
    /// Converter full scale in the channel's unit (the largest magnitude the
    /// converter can report).
    pub full_scale: f64,
    /// Fraction of full scale at which a sample counts as clipped, (0, 1].
    pub fraction: f64,
    /// Clipped samples in one window that make it a fault, >= 1.
    pub samples: usize,
}

#[derive(Debug, Clone, Copy, PartialEq, serde::Serialize)]
pub struct BiasSpec {
    /// Lowest acceptable window mean, channel unit.
    pub lo: f64,
    /// Highest acceptable window mean, channel unit.
    pub hi: f64,
}

#[derive(Debug, Clone, Copy, PartialEq, serde::Serialize)]
pub struct StaleSpec {
    pub after_s: f64,
}

#[derive(Debug, Clone, Copy, PartialEq, serde::Serialize)]
pub struct GapSpec {
    /// More than this many discontinuities within the window is a fault.
    pub max: u32,
    pub window_s: f64,
}

/// The validated health checks of one channel.
#[derive(Debug, Clone, Copy, PartialEq, serde::Serialize)]
pub struct HealthSpec {
    pub flatline: Option<FlatlineSpec>,
    pub clipping: Option<ClippingSpec>,
    pub bias: Option<BiasSpec>,
    pub stale: Option<StaleSpec>,
    pub gaps: Option<GapSpec>,
    /// Seconds without any fault before the channel is OK again.
    pub recover_s: f64,
}

impl Default for HealthSpec {
    /// What a channel without a `health` table gets: stale after 5 s, more
    /// than 10 gaps a minute, 5 s to recover. Flatline, clipping and bias
    /// need the sensor's figures and are off unless configured.
    fn default() -> HealthSpec {
        HealthSpec {
            flatline: None,
            clipping: None,
            bias: None,
            stale: Some(StaleSpec { after_s: 5.0 }),
            gaps: Some(GapSpec {
                max: 10,
                window_s: 60.0,
            }),
            recover_s: 5.0,
        }
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
