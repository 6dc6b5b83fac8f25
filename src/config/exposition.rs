//! `[metrics]`: what `/metrics` leaves out, for installations where the
//! exposition's size is the cost (README "Config reference", "Trimming
//! /metrics"). The config only checks the entries' form; which families a
//! pattern matches is known where the families are named (the HTTP layer's
//! `metrics::check_exposition`, run by `bandwatch check`, at start and at
//! each reload).

use serde::Deserialize;

use super::issue::Issues;

/// `[metrics]` as written.
#[derive(Debug, Clone, Default, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawMetrics {
    /// Families not exported: exact names, or a prefix ending in `*`.
    #[serde(default)]
    pub exclude: Vec<String>,
    /// Which bands' series are exported.
    #[serde(default)]
    pub bands: BandExport,
}

/// Which bands' series (`bandwatch_band_*`) `/metrics` exports.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum BandExport {
    /// Every band (the default).
    #[default]
    All,
    /// Only bands an alarm watches; the others stay in the JSON API.
    Alarmed,
}

impl BandExport {
    pub fn as_str(self) -> &'static str {
        match self {
            BandExport::All => "all",
            BandExport::Alarmed => "alarmed",
        }
    }
}

/// One `[metrics] exclude` entry: a family name, or a name prefix (written
/// with a trailing `*`).
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct FamilyPattern {
    /// The name, or the prefix without its `*`.
    pub text: String,
    pub prefix: bool,
}

impl FamilyPattern {
    pub fn matches(&self, family: &str) -> bool {
        if self.prefix {
            family.starts_with(&self.text)
        } else {
            family == self.text
        }
    }
}

impl std::fmt::Display for FamilyPattern {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str(&self.text)?;
        if self.prefix {
            f.write_str("*")?;
        }
        Ok(())
    }
}

/// `[metrics]`, checked.
#[derive(Debug, Clone, Default, PartialEq, Eq)]
pub struct ExpositionSpec {
    pub exclude: Vec<FamilyPattern>,
    pub bands: BandExport,
}

impl ExpositionSpec {
    /// Whether `family` is left out.
    pub fn excludes(&self, family: &str) -> bool {
        self.exclude.iter().any(|p| p.matches(family))
    }
}

/// Whether `s` is a metric name as the Prometheus data model allows
/// (`[a-zA-Z_:][a-zA-Z0-9_:]*`).
fn is_metric_name(s: &str) -> bool {
    let mut chars = s.chars();
    matches!(chars.next(), Some(c) if c.is_ascii_alphabetic() || c == '_' || c == ':')
        && chars.all(|c| c.is_ascii_alphanumeric() || c == '_' || c == ':')
}

/// `[metrics]`: each entry a metric name or a prefix of one with a `*` at
/// the end (at least `bandwatch_` long, so one entry cannot blank the whole
/// exposition by accident); no entry twice.
pub(crate) fn check_metrics(issues: &mut Issues, raw: &RawMetrics) -> ExpositionSpec {
    let mut exclude: Vec<FamilyPattern> = Vec::new();
    for (k, e) in raw.exclude.iter().enumerate() {
        let path = format!("metrics.exclude[{k}]");
        let (text, prefix) = match e.strip_suffix('*') {
            Some(t) => (t, true),
            None => (e.as_str(), false),
        };
        if !is_metric_name(text) {
            issues.add(
                path,
                format!(
                    "{e:?} is not a metric family name (letters, digits, '_' and ':'), \
                     or a prefix of one ending in '*'"
                ),
            );
            continue;
        }
        if prefix && text.len() < "bandwatch_".len() {
            issues.add(
                path,
                format!(
                    "{e:?}: a prefix must have at least 10 characters before the '*' \
                     (e.g. \"bandwatch_alarm_*\")"
                ),
            );
            continue;
        }
        let p = FamilyPattern {
            text: text.to_string(),
            prefix,
        };
        if exclude.contains(&p) {
            issues.add(path, format!("{e:?} is listed twice"));
            continue;
        }
        exclude.push(p);
    }
    ExpositionSpec {
        exclude,
        bands: raw.bands,
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn check(exclude: &[&str]) -> (ExpositionSpec, Vec<(String, String)>) {
        let mut issues = Issues::default();
        let raw = RawMetrics {
            exclude: exclude.iter().map(|s| s.to_string()).collect(),
            bands: BandExport::All,
        };
        let spec = check_metrics(&mut issues, &raw);
        let pairs = issues
            .into_vec()
            .into_iter()
            .map(|i| (i.path, i.message))
            .collect();
        (spec, pairs)
    }

    #[test]
    fn names_and_prefixes_are_accepted_and_match() {
        let (spec, issues) = check(&[
            "bandwatch_band_peak_frequency_hertz",
            "bandwatch_alarm_limit_*",
        ]);
        assert!(issues.is_empty(), "{issues:?}");
        assert!(spec.excludes("bandwatch_band_peak_frequency_hertz"));
        assert!(!spec.excludes("bandwatch_band_peak_frequency_hertz_x"));
        assert!(spec.excludes("bandwatch_alarm_limit_meters_per_second"));
        assert!(!spec.excludes("bandwatch_alarm_limit"));
        assert!(!spec.excludes("bandwatch_alarm_state"));
    }

    #[test]
    fn bad_entries_name_their_index() {
        let (spec, issues) = check(&[
            "bandwatch_ok",
            "bandwatch band",
            "*",
            "bandwatch_ok",
            "9lives",
            "band*",
            "bandwatch_a*b",
        ]);
        let paths: Vec<&str> = issues.iter().map(|(p, _)| p.as_str()).collect();
        assert_eq!(
            paths,
            [
                "metrics.exclude[1]",
                "metrics.exclude[2]",
                "metrics.exclude[3]",
                "metrics.exclude[4]",
                "metrics.exclude[5]",
                "metrics.exclude[6]",
            ],
            "{issues:?}"
        );
        assert!(issues[2].1.contains("twice"), "{issues:?}");
        assert_eq!(spec.exclude.len(), 1);
    }
}
