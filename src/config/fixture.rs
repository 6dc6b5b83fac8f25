//! Config text for tests and tools: a small builder that writes the TOML
//! of a config with N sources, channels and bands, so tests do not repeat
//! hand-written config text. It writes text only (what a user would
//! write); parsing stays [`crate::config::parse_str`]'s job.
//!
//! ```
//! use bandwatch::config::fixture::{Channel, Fixture, Source};
//! let text = Fixture::new()
//!     .source(Source::new("s", "sim"))
//!     .channel(Channel::new("c", "s", 0).block(1024).band("1x", 21.0, 28.5))
//!     .toml();
//! let cfg = bandwatch::config::parse_str(&text).expect("valid");
//! assert_eq!(cfg.channels[0].block, 1024);
//! ```

use std::fmt::Write as _;

/// `key = value` lines; values are TOML as given (quote strings with
/// [`quoted`]).
type Keys = Vec<(String, String)>;

/// A TOML basic string: `"…"` with `\` and `"` escaped.
pub fn quoted(s: &str) -> String {
    let mut out = String::with_capacity(s.len() + 2);
    out.push('"');
    for c in s.chars() {
        match c {
            '\\' => out.push_str("\\\\"),
            '"' => out.push_str("\\\""),
            '\n' => out.push_str("\\n"),
            c => out.push(c),
        }
    }
    out.push('"');
    out
}

fn write_keys(out: &mut String, indent: &str, keys: &Keys) {
    for (k, v) in keys {
        let _ = writeln!(out, "{indent}{k} = {v}");
    }
}

/// A whole config: `[server] listen`, optional extra tables, sources and
/// channels in the order given.
#[derive(Debug, Clone)]
pub struct Fixture {
    listen: String,
    extra: Vec<String>,
    sources: Vec<Source>,
    channels: Vec<Channel>,
}

impl Default for Fixture {
    fn default() -> Self {
        Fixture::new()
    }
}

impl Fixture {
    /// No sources or channels; the server on `127.0.0.1:0`.
    pub fn new() -> Fixture {
        Fixture {
            listen: "127.0.0.1:0".into(),
            extra: Vec::new(),
            sources: Vec::new(),
            channels: Vec::new(),
        }
    }

    /// TOML text written as it is after `[server]` (e.g. `"[dsp]\nworkers = 1"`).
    pub fn raw(mut self, text: &str) -> Fixture {
        self.extra.push(text.trim_end().to_string());
        self
    }

    pub fn source(mut self, s: Source) -> Fixture {
        self.sources.push(s);
        self
    }

    pub fn channel(mut self, c: Channel) -> Fixture {
        self.channels.push(c);
        self
    }

    /// `n` channels `prefix0…` on `source`, indices 0…n−1, each as `each`
    /// makes it from the plain channel.
    pub fn channels(
        mut self,
        prefix: &str,
        source: &str,
        n: usize,
        each: impl Fn(Channel) -> Channel,
    ) -> Fixture {
        for i in 0..n {
            self.channels
                .push(each(Channel::new(&format!("{prefix}{i}"), source, i)));
        }
        self
    }

    /// The TOML text.
    pub fn toml(&self) -> String {
        let mut out = String::new();
        let _ = writeln!(out, "[server]\nlisten = {}", quoted(&self.listen));
        for e in &self.extra {
            let _ = writeln!(out, "{e}");
        }
        for s in &self.sources {
            out.push_str("[[source]]\n");
            write_keys(&mut out, "", &s.keys);
        }
        for c in &self.channels {
            out.push_str("[[channel]]\n");
            write_keys(&mut out, "", &c.keys);
            for b in &c.bands {
                out.push_str("  [[channel.band]]\n");
                write_keys(&mut out, "  ", b);
            }
        }
        out
    }
}

/// One `[[source]]`.
#[derive(Debug, Clone)]
pub struct Source {
    keys: Keys,
}

impl Source {
    pub fn new(name: &str, kind: &str) -> Source {
        Source {
            keys: vec![("name".into(), quoted(name)), ("kind".into(), quoted(kind))],
        }
    }

    /// Any key, its value as TOML text (`"25600"`, `quoted("lines")`).
    pub fn set(mut self, key: &str, toml_value: impl Into<String>) -> Source {
        self.keys.push((key.into(), toml_value.into()));
        self
    }

    /// A stream source's `channels` and `sample_rate_hz`.
    pub fn stream(self, channels: usize, sample_rate_hz: u32) -> Source {
        self.set("channels", channels.to_string())
            .set("sample_rate_hz", sample_rate_hz.to_string())
    }
}

/// One `[[channel]]` with its bands. [`Channel::new`] writes `unit = "g"`;
/// every other key is left to the config's default unless set.
#[derive(Debug, Clone)]
pub struct Channel {
    keys: Keys,
    bands: Vec<Keys>,
}

impl Channel {
    pub fn new(name: &str, source: &str, index: usize) -> Channel {
        Channel {
            keys: vec![
                ("name".into(), quoted(name)),
                ("source".into(), quoted(source)),
                ("index".into(), index.to_string()),
                ("unit".into(), quoted("g")),
            ],
            bands: Vec::new(),
        }
    }

    /// Any key, its value as TOML text; a key set twice keeps the last value.
    pub fn set(mut self, key: &str, toml_value: impl Into<String>) -> Channel {
        let v = toml_value.into();
        match self.keys.iter_mut().find(|(k, _)| k == key) {
            Some(kv) => kv.1 = v,
            None => self.keys.push((key.into(), v)),
        }
        self
    }

    pub fn unit(self, unit: &str) -> Channel {
        self.set("unit", quoted(unit))
    }

    pub fn block(self, n: usize) -> Channel {
        self.set("block", n.to_string())
    }

    pub fn overlap(self, x: f64) -> Channel {
        self.set("overlap", format!("{x:?}"))
    }

    pub fn window(self, w: &str) -> Channel {
        self.set("window", quoted(w))
    }

    /// `averaging = { mode = "none" }`.
    pub fn no_averaging(self) -> Channel {
        self.set("averaging", "{ mode = \"none\" }")
    }

    /// A band of fixed edges in Hz.
    pub fn band(self, name: &str, lo_hz: f64, hi_hz: f64) -> Channel {
        self.band_with(name, lo_hz, hi_hz, &[])
    }

    /// A band of fixed edges with more keys (`("unit", quoted("mm/s"))`).
    pub fn band_with(
        mut self,
        name: &str,
        lo_hz: f64,
        hi_hz: f64,
        more: &[(&str, String)],
    ) -> Channel {
        let mut b: Keys = vec![
            ("name".into(), quoted(name)),
            ("lo_hz".into(), format!("{lo_hz:?}")),
            ("hi_hz".into(), format!("{hi_hz:?}")),
        ];
        b.extend(more.iter().map(|(k, v)| (k.to_string(), v.clone())));
        self.bands.push(b);
        self
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::config::parse_str;

    #[test]
    fn writes_what_the_parser_reads() {
        let text = Fixture::new()
            .raw("[dsp]\nworkers = 1")
            .source(
                Source::new("daq", "tcp-listen")
                    .set("listen", quoted("127.0.0.1:0"))
                    .stream(3, 25_600),
            )
            .channels("c", "daq", 2, |c| c.block(1024).overlap(0.0).no_averaging())
            .channel(
                Channel::new("x\"y", "daq", 2)
                    .unit("m/s^2")
                    .band("tone", 50.0, 150.0)
                    .band_with("v", 10.0, 1000.0, &[("unit", quoted("mm/s"))]),
            )
            .toml();
        let cfg = match parse_str(&text) {
            Ok(c) => c,
            Err(e) => panic!("{e:?}\n{text}"),
        };
        assert_eq!(cfg.channels.len(), 3);
        assert_eq!(cfg.channels[1].name, "c1");
        assert_eq!(cfg.channels[1].block, 1024);
        assert_eq!(cfg.channels[2].name, "x\"y");
        assert_eq!(cfg.channels[2].bands.len(), 2);
        assert_eq!(cfg.channels[2].bands[1].unit.symbol, "mm/s");
        assert_eq!(cfg.channels[0].sample_rate_hz, 25_600.0);
    }
}
