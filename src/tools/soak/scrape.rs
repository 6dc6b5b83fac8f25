//! The soak's view of `/metrics`: a parser of the Prometheus text
//! exposition (the subset the daemon writes: `# TYPE`/`# HELP` comments,
//! `name{label="value",…} value`), the check that every counter series only
//! goes up from one scrape to the next, and the per-channel accounting of
//! samples (README, "Metrics" and "Sequence rules").

use std::collections::BTreeMap;

/// One sample line: metric name, labels (sorted by name) and value.
#[derive(Debug, Clone, PartialEq)]
pub struct Sample {
    pub name: String,
    pub labels: Vec<(String, String)>,
    pub value: f64,
}

impl Sample {
    /// `name{a="x",b="y"}` with labels sorted: one key per series.
    pub fn key(&self) -> String {
        if self.labels.is_empty() {
            return self.name.clone();
        }
        let inner: Vec<String> = self
            .labels
            .iter()
            .map(|(k, v)| format!("{k}={v:?}"))
            .collect();
        format!("{}{{{}}}", self.name, inner.join(","))
    }

    fn label(&self, name: &str) -> Option<&str> {
        self.labels
            .iter()
            .find(|(k, _)| k == name)
            .map(|(_, v)| v.as_str())
    }
}

/// One parsed exposition.
#[derive(Debug, Clone, Default)]
pub struct Exposition {
    pub samples: Vec<Sample>,
    /// `# TYPE` of each family.
    pub types: BTreeMap<String, String>,
}

/// A line the parser could not read, with its 1-based number.
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
#[error("/metrics line {line}: {what}: {text:?}")]
pub struct ParseError {
    pub line: usize,
    pub what: &'static str,
    pub text: String,
}

/// Parses a text exposition.
///
/// # Errors
/// The first line that is not a comment, blank, or a well-formed sample.
pub fn parse(text: &str) -> Result<Exposition, ParseError> {
    let mut out = Exposition::default();
    for (i, line) in text.lines().enumerate() {
        let err = |what| ParseError {
            line: i + 1,
            what,
            text: line.chars().take(200).collect(),
        };
        let line = line.trim();
        if line.is_empty() {
            continue;
        }
        if let Some(rest) = line.strip_prefix('#') {
            let mut words = rest.split_whitespace();
            if words.next() == Some("TYPE") {
                let (Some(family), Some(kind)) = (words.next(), words.next()) else {
                    return Err(err("a TYPE line needs a name and a type"));
                };
                out.types.insert(family.to_string(), kind.to_string());
            }
            continue;
        }
        let name_end = line
            .find(|c: char| c == '{' || c.is_whitespace())
            .ok_or_else(|| err("no value"))?;
        let name = &line[..name_end];
        if name.is_empty() {
            return Err(err("no metric name"));
        }
        let mut rest = &line[name_end..];
        let mut labels = Vec::new();
        if let Some(r) = rest.strip_prefix('{') {
            let (l, after) = parse_labels(r).ok_or_else(|| err("malformed labels"))?;
            labels = l;
            rest = after;
        }
        let value_text = rest
            .split_whitespace()
            .next()
            .ok_or_else(|| err("no value"))?;
        let value = parse_value(value_text).ok_or_else(|| err("value is not a number"))?;
        labels.sort();
        out.samples.push(Sample {
            name: name.to_string(),
            labels,
            value,
        });
    }
    Ok(out)
}

/// Label pairs up to the closing brace; returns them and the text after it.
fn parse_labels(mut s: &str) -> Option<(Vec<(String, String)>, &str)> {
    let mut labels = Vec::new();
    loop {
        s = s.trim_start_matches([' ', ',']);
        if let Some(after) = s.strip_prefix('}') {
            return Some((labels, after));
        }
        let eq = s.find('=')?;
        let name = s[..eq].trim().to_string();
        let mut chars = s[eq + 1..].char_indices();
        if chars.next()?.1 != '"' {
            return None;
        }
        let mut value = String::new();
        let mut escaped = false;
        let mut end = None;
        for (i, c) in chars {
            match (escaped, c) {
                (true, 'n') => {
                    value.push('\n');
                    escaped = false;
                }
                (true, c) => {
                    value.push(c);
                    escaped = false;
                }
                (false, '\\') => escaped = true,
                (false, '"') => {
                    end = Some(eq + 1 + i + 1);
                    break;
                }
                (false, c) => value.push(c),
            }
        }
        s = &s[end?..];
        labels.push((name, value));
    }
}

fn parse_value(s: &str) -> Option<f64> {
    match s {
        "NaN" => Some(f64::NAN),
        "+Inf" | "Inf" => Some(f64::INFINITY),
        "-Inf" => Some(f64::NEG_INFINITY),
        _ => s.parse().ok(),
    }
}

impl Exposition {
    /// Sum of the series of `name` whose labels include every pair of `with`.
    pub fn sum(&self, name: &str, with: &[(&str, &str)]) -> f64 {
        self.samples
            .iter()
            .filter(|s| s.name == name && with.iter().all(|(k, v)| s.label(k) == Some(v)))
            .fold(0.0, |a, s| a + s.value)
    }

    /// Values of label `by` over the series of `name` matching `with`.
    pub fn by_label(&self, name: &str, with: &[(&str, &str)], by: &str) -> BTreeMap<String, f64> {
        let mut out = BTreeMap::new();
        for s in self
            .samples
            .iter()
            .filter(|s| s.name == name && with.iter().all(|(k, v)| s.label(k) == Some(v)))
        {
            if let Some(l) = s.label(by) {
                *out.entry(l.to_string()).or_insert(0.0) += s.value;
            }
        }
        out
    }

    /// Whether a series must never decrease: a `counter` family (its
    /// series end in `_total`), any `*_total` series, and a histogram's or
    /// summary's `_count` and `_sum`.
    pub fn is_monotonic(&self, name: &str) -> bool {
        if name.ends_with("_total") || self.types.get(name).is_some_and(|t| t == "counter") {
            return true;
        }
        ["_count", "_sum"].iter().any(|suffix| {
            name.strip_suffix(suffix).is_some_and(|family| {
                self.types
                    .get(family)
                    .is_some_and(|t| t == "histogram" || t == "summary")
            })
        })
    }
}

/// A counter that went down or disappeared between two scrapes.
#[derive(Debug, Clone, PartialEq, serde::Serialize)]
pub struct Violation {
    pub series: String,
    /// Scrape number (from 1) where it was seen wrong.
    pub scrape: usize,
    pub before: f64,
    /// `None`: the series vanished.
    pub after: Option<f64>,
}

/// Follows every monotonic series over the scrapes.
#[derive(Debug, Default)]
pub struct Monotonic {
    last: BTreeMap<String, f64>,
    pub scrapes: usize,
    pub series: usize,
    pub violations: Vec<Violation>,
}

impl Monotonic {
    /// Takes the next scrape.
    pub fn observe(&mut self, e: &Exposition) {
        self.scrapes += 1;
        let mut now = BTreeMap::new();
        for s in &e.samples {
            if e.is_monotonic(&s.name) {
                now.insert(s.key(), s.value);
            }
        }
        for (key, &before) in &self.last {
            match now.get(key) {
                // NaN never compares: a NaN counter is a violation too.
                Some(&after) if after >= before => {}
                after => self.violations.push(Violation {
                    series: key.clone(),
                    scrape: self.scrapes,
                    before,
                    after: after.copied(),
                }),
            }
        }
        self.series = now.len();
        self.last = now;
    }
}

/// One channel's accounting: instants its source made (every frame of
/// the sequence, including those the fault injection dropped or
/// corrupted; a duplicate once; a forward jump's skipped indices never)
/// against samples received plus samples dropped by reason.
#[derive(Debug, Clone, PartialEq, serde::Serialize)]
pub struct ChannelBalance {
    pub channel: String,
    pub made: u64,
    pub received: u64,
    pub dropped: BTreeMap<String, u64>,
    /// made − received − Σ dropped: 0 when every instant is accounted for.
    pub difference: i128,
}

/// Balances `channel` in the exposition `e` against `made` instants.
pub fn balance(e: &Exposition, channel: &str, made: u64) -> ChannelBalance {
    let received = e.sum(
        "bandwatch_channel_samples_received_total",
        &[("channel", channel)],
    ) as u64;
    let dropped: BTreeMap<String, u64> = e
        .by_label(
            "bandwatch_channel_samples_dropped_total",
            &[("channel", channel)],
            "reason",
        )
        .into_iter()
        .map(|(k, v)| (k, v as u64))
        .collect();
    let lost: u64 = dropped.values().sum();
    ChannelBalance {
        channel: channel.to_string(),
        made,
        received,
        dropped,
        difference: i128::from(made) - i128::from(received) - i128::from(lost),
    }
}

#[cfg(test)]
#[allow(clippy::unwrap_used)] // tests may unwrap: a panic is a failed test
mod tests {
    use super::*;

    /// Written by hand after the text format of the Prometheus exposition
    /// format documentation (from memory): comments, labels with escapes,
    /// special values, an optional timestamp.
    const TEXT: &str = r#"# HELP bandwatch_source_rejected_total Frames refused.
# TYPE bandwatch_source_rejected_total counter
bandwatch_source_rejected_total{source="udp",reason="crc_mismatch"} 3
bandwatch_source_rejected_total{reason="too_large",source="udp"} 2
# TYPE bandwatch_channel_crest_factor gauge
bandwatch_channel_crest_factor{channel="a \"quoted\" \\ name"} NaN
bandwatch_channel_rms{channel="x"} +Inf
bandwatch_channel_mean{channel="x"} -1.5e-3 1700000000000
# TYPE lat histogram
lat_bucket{le="0.1"} 4
lat_count 4
lat_sum 0.25
bandwatch_build_info{version="0.1.0"} 1
"#;

    #[test]
    fn parses_labels_escapes_and_special_values() {
        let e = parse(TEXT).unwrap();
        assert_eq!(e.samples.len(), 9);
        assert_eq!(
            e.samples[2].labels,
            vec![("channel".to_string(), "a \"quoted\" \\ name".to_string())]
        );
        assert!(e.samples[2].value.is_nan());
        assert_eq!(e.samples[3].value, f64::INFINITY);
        assert_eq!(e.samples[4].value, -1.5e-3);
        // Label order on the wire does not matter.
        assert_eq!(e.samples[0].key(), e.samples[0].key());
        assert_eq!(
            e.samples[1].key(),
            r#"bandwatch_source_rejected_total{reason="too_large",source="udp"}"#
        );
        assert_eq!(
            e.sum("bandwatch_source_rejected_total", &[("source", "udp")]),
            5.0
        );
        let by = e.by_label("bandwatch_source_rejected_total", &[], "reason");
        assert_eq!(by.get("crc_mismatch"), Some(&3.0));
        assert_eq!(e.types.get("lat").map(String::as_str), Some("histogram"));
    }

    #[test]
    fn refuses_malformed_lines_naming_the_line() {
        let e = parse("a 1\nb{x=\"1\" 2\n").unwrap_err();
        assert_eq!(e.line, 2);
        assert_eq!(parse("a one").unwrap_err().what, "value is not a number");
        assert_eq!(parse("{x=\"1\"} 1").unwrap_err().what, "no metric name");
        assert_eq!(parse("a{x=1} 1").unwrap_err().what, "malformed labels");
    }

    #[test]
    fn which_series_are_monotonic() {
        let e = parse(TEXT).unwrap();
        assert!(e.is_monotonic("bandwatch_source_rejected_total"));
        assert!(e.is_monotonic("lat_count"));
        assert!(e.is_monotonic("lat_sum"));
        assert!(!e.is_monotonic("lat_bucket"));
        assert!(!e.is_monotonic("bandwatch_channel_crest_factor"));
        assert!(!e.is_monotonic("bandwatch_build_info"));
    }

    #[test]
    fn a_counter_that_goes_down_or_vanishes_is_a_violation() {
        let mut m = Monotonic::default();
        m.observe(&parse("a_total 5\nb_total 1\nc_total 7\ng 9\n").unwrap());
        m.observe(&parse("a_total 5\nb_total 2\nc_total 7\ng 1\n").unwrap());
        assert!(m.violations.is_empty(), "{:?}", m.violations);
        m.observe(&parse("a_total 4\nb_total 2\ng 3\n").unwrap());
        assert_eq!(
            m.violations,
            vec![
                Violation {
                    series: "a_total".into(),
                    scrape: 3,
                    before: 5.0,
                    after: Some(4.0)
                },
                Violation {
                    series: "c_total".into(),
                    scrape: 3,
                    before: 7.0,
                    after: None
                },
            ]
        );
        // A histogram's count going down.
        let mut m = Monotonic::default();
        m.observe(&parse("# TYPE h histogram\nh_count 3\nh_sum 1\n").unwrap());
        m.observe(&parse("# TYPE h histogram\nh_count 2\nh_sum 1\n").unwrap());
        assert_eq!(m.violations.len(), 1);
        assert_eq!(m.series, 2);
    }

    #[test]
    fn balance_adds_every_drop_reason() {
        let text = r#"bandwatch_channel_samples_received_total{channel="c"} 1000
bandwatch_channel_samples_dropped_total{channel="c",reason="sequence_gap"} 256
bandwatch_channel_samples_dropped_total{channel="c",reason="restart"} 512
bandwatch_channel_samples_dropped_total{channel="c",reason="non_finite"} 2
bandwatch_channel_samples_dropped_total{channel="c",reason="ring_overflow"} 0
bandwatch_channel_samples_dropped_total{channel="d",reason="restart"} 99
"#;
        let e = parse(text).unwrap();
        let b = balance(&e, "c", 1770);
        assert_eq!(b.received, 1000);
        assert_eq!(b.dropped.get("restart"), Some(&512));
        assert_eq!(b.difference, 0);
        assert_eq!(balance(&e, "c", 1771).difference, 1);
        assert_eq!(balance(&e, "c", 1700).difference, -70);
        assert_eq!(balance(&e, "d", 99).difference, 0);
    }
}
