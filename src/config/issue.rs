//! The one config problem type, `ConfigIssue` (field path + why), and
//! `Issues`, the single list every check of the config adds to.

use std::fmt;

/// One problem in a config, with the path of the field at fault.
#[derive(Debug, Clone, PartialEq)]
pub struct ConfigIssue {
    pub path: String,
    pub message: String,
}

impl fmt::Display for ConfigIssue {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(f, "{}: {}", self.path, self.message)
    }
}

/// The list of problems found so far; every check adds to one of these.
#[derive(Debug, Default)]
pub(crate) struct Issues(Vec<ConfigIssue>);

impl Issues {
    pub(crate) fn add(&mut self, path: impl Into<String>, message: impl Into<String>) {
        self.0.push(ConfigIssue {
            path: path.into(),
            message: message.into(),
        });
    }

    /// Adds the problems another check returned.
    pub(crate) fn extend(&mut self, issues: Vec<ConfigIssue>) {
        self.0.extend(issues);
    }

    pub(crate) fn len(&self) -> usize {
        self.0.len()
    }

    pub(crate) fn is_empty(&self) -> bool {
        self.0.is_empty()
    }

    pub(crate) fn into_vec(self) -> Vec<ConfigIssue> {
        self.0
    }

    /// Adds "`v` is out of range `lo` to `hi`" unless `lo <= v <= hi` (finite).
    pub(crate) fn check_range(&mut self, path: String, v: f64, lo: f64, hi: f64) {
        if !(v.is_finite() && v >= lo && v <= hi) {
            self.add(path, format!("{v} is out of range {lo} to {hi}"));
        }
    }
}

#[cfg(test)]
impl Issues {
    /// (path, message) of every issue, for assertions.
    pub(crate) fn pairs(&self) -> Vec<(&str, &str)> {
        self.0
            .iter()
            .map(|i| (i.path.as_str(), i.message.as_str()))
            .collect()
    }
}
