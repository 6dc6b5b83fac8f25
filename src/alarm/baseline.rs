//! Baselines: a band learns its normal level over a period of healthy
//! running, and its limits become `mean × factor` or `mean ± k·σ`.
//!
//! The learner accumulates the mean and the sample standard deviation with
//! Welford's online algorithm (numerically stable, constant memory). Only
//! [`Input::Value`]s count; time is counted only between consecutive values,
//! so a gap or an inhibit stops the clock without discarding what was
//! learned. Learning ends once `learn_s` seconds of healthy values (and at
//! least [`MIN_VALUES`] of them) have been seen.
//!
//! A finished baseline is saved as JSON in the storage directory with an
//! atomic write (temp file, fsync, rename, fsync of the directory), and is
//! loaded again on start. Re-learning is an explicit operator action
//! ([`Learner::restart`]); nothing re-learns by itself.
//!
//! Shewhart's mean + 3σ (one-sided false-alarm rate 0.135 % per independent
//! test for normal data) is the common choice for σ rules (common practice).

use std::fs;
use std::io;
use std::path::{Path, PathBuf};

use serde::{Deserialize, Serialize};

use super::fsutil::{atomic_write, safe_name};
use super::state::{Direction, Input};
pub use crate::config::alarms::LimitRule;

/// Fewest values a baseline is made from.
pub const MIN_VALUES: u64 = 10;

/// A learned baseline, as stored.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Baseline {
    /// Format version of this file, 1.
    pub version: u32,
    pub channel: String,
    pub band: String,
    /// Unit of `mean` and `std` (the band's unit).
    pub unit: String,
    pub mean: f64,
    /// Sample standard deviation (n − 1 in the denominator).
    pub std: f64,
    /// Values it was made from.
    pub count: u64,
    /// Seconds of healthy running it covers.
    pub learned_s: f64,
    /// When learning finished, ns since the Unix epoch.
    pub finished_unix_ns: u64,
}

impl Baseline {
    /// The limit a rule gives for a level of the given direction.
    pub fn limit(&self, rule: LimitRule, direction: Direction) -> f64 {
        match (rule, direction) {
            (LimitRule::Factor(f), _) => self.mean * f,
            (LimitRule::Sigma(k), Direction::High) => self.mean + k * self.std,
            (LimitRule::Sigma(k), Direction::Low) => self.mean - k * self.std,
        }
    }
}

/// Mean, σ and count from a finished learner.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Learned {
    pub mean: f64,
    pub std: f64,
    pub count: u64,
    pub learned_s: f64,
}

/// Welford accumulator over healthy values, for `learn_s` seconds.
#[derive(Debug, Clone)]
pub struct Learner {
    learn_s: f64,
    n: u64,
    mean: f64,
    m2: f64,
    learned_s: f64,
    last_value_at: Option<f64>,
    done: bool,
}

impl Learner {
    pub fn new(learn_s: f64) -> Learner {
        Learner {
            learn_s,
            n: 0,
            mean: 0.0,
            m2: 0.0,
            learned_s: 0.0,
            last_value_at: None,
            done: false,
        }
    }

    /// Forgets everything and learns again (an operator action).
    pub fn restart(&mut self) {
        *self = Learner::new(self.learn_s);
    }

    /// Adds one evaluation. Returns the result once, when learning ends;
    /// after that the learner ignores input until [`restart`](Self::restart).
    pub fn push(&mut self, now: f64, input: Input) -> Option<Learned> {
        if self.done {
            return None;
        }
        let Input::Value(x) = input else {
            self.last_value_at = None;
            return None;
        };
        if !x.is_finite() {
            self.last_value_at = None;
            return None;
        }
        if let Some(t) = self.last_value_at {
            self.learned_s += (now - t).max(0.0);
        }
        self.last_value_at = Some(now);
        self.add(x);
        if self.learned_s >= self.learn_s && self.n >= MIN_VALUES {
            self.done = true;
            return Some(self.current());
        }
        None
    }

    fn add(&mut self, x: f64) {
        self.n += 1;
        let d = x - self.mean;
        self.mean += d / self.n as f64;
        self.m2 += d * (x - self.mean);
    }

    /// The statistics so far.
    pub fn current(&self) -> Learned {
        let std = if self.n > 1 {
            (self.m2 / (self.n - 1) as f64).sqrt()
        } else {
            0.0
        };
        Learned {
            mean: self.mean,
            std,
            count: self.n,
            learned_s: self.learned_s,
        }
    }

    /// Fraction of the learning period covered, 0 to 1.
    pub fn progress(&self) -> f64 {
        if self.learn_s <= 0.0 {
            return if self.done { 1.0 } else { 0.0 };
        }
        (self.learned_s / self.learn_s).clamp(0.0, 1.0)
    }

    pub fn is_done(&self) -> bool {
        self.done
    }
}

#[derive(Debug, thiserror::Error)]
pub enum BaselineError {
    #[error("cannot access baseline file {path}: {source}")]
    Io {
        path: PathBuf,
        #[source]
        source: io::Error,
    },
    #[error("baseline file {path} is not a valid baseline: {message}")]
    Invalid { path: PathBuf, message: String },
}

/// File of a band's baseline inside `dir`.
pub fn path_for(dir: &Path, channel: &str, band: &str) -> PathBuf {
    dir.join(file_name(channel, band))
}

fn file_name(channel: &str, band: &str) -> String {
    format!("{}.{}.baseline.json", safe_name(channel), safe_name(band))
}

/// Saves atomically (see the module docs).
///
/// # Errors
/// [`BaselineError::Io`] naming the file.
pub fn save(dir: &Path, b: &Baseline) -> Result<(), BaselineError> {
    let name = file_name(&b.channel, &b.band);
    let io_err = |source| BaselineError::Io {
        path: dir.join(&name),
        source,
    };
    fs::create_dir_all(dir).map_err(io_err)?;
    let mut text = serde_json::to_vec_pretty(b).map_err(|e| BaselineError::Invalid {
        path: dir.join(&name),
        message: e.to_string(),
    })?;
    text.push(b'\n');
    atomic_write(dir, &name, &text).map_err(io_err)
}

/// Loads a band's baseline; `Ok(None)` if none was saved.
///
/// # Errors
/// [`BaselineError::Io`] if the file exists but cannot be read,
/// [`BaselineError::Invalid`] if it is not a baseline of this band.
pub fn load(dir: &Path, channel: &str, band: &str) -> Result<Option<Baseline>, BaselineError> {
    let path = path_for(dir, channel, band);
    let text = match fs::read(&path) {
        Ok(t) => t,
        Err(e) if e.kind() == io::ErrorKind::NotFound => return Ok(None),
        Err(source) => return Err(BaselineError::Io { path, source }),
    };
    let b: Baseline = serde_json::from_slice(&text).map_err(|e| BaselineError::Invalid {
        path: path.clone(),
        message: e.to_string(),
    })?;
    if b.version != 1 || b.channel != channel || b.band != band {
        return Err(BaselineError::Invalid {
            path,
            message: format!(
                "version {} for {:?}/{:?}, expected version 1 for {channel:?}/{band:?}",
                b.version, b.channel, b.band
            ),
        });
    }
    if !(b.mean.is_finite() && b.std.is_finite() && b.std >= 0.0) {
        return Err(BaselineError::Invalid {
            path,
            message: format!("mean {} / std {} must be finite, std >= 0", b.mean, b.std),
        });
    }
    Ok(Some(b))
}

/// Removes a band's baseline (before re-learning), if there is one.
///
/// # Errors
/// [`BaselineError::Io`] if it exists and cannot be removed.
pub fn remove(dir: &Path, channel: &str, band: &str) -> Result<(), BaselineError> {
    let path = path_for(dir, channel, band);
    match fs::remove_file(&path) {
        Ok(()) => {
            super::fsutil::fsync_dir(dir).map_err(|source| BaselineError::Io { path, source })
        }
        Err(e) if e.kind() == io::ErrorKind::NotFound => Ok(()),
        Err(source) => Err(BaselineError::Io { path, source }),
    }
}
