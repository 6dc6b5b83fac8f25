//! Checks of the `[[channel]]` tables: names, the source input each one
//! reads, unit, scaling, block/FFT/overlap, averaging, integration cut-off,
//! machine and envelope band, then (through `bands` and `channel_alarms`)
//! its bands, health and alarms, into `ChannelSpec`s.

use std::collections::{HashMap, HashSet};

use crate::config::issue::Issues;
use crate::config::raw::{RawAveraging, RawChannel, RawConfig, RawEnvelope, RawMachine};
use crate::config::spec::{ChannelSpec, SourceSpec};
use crate::units::Unit;

use super::bands::{check_bands, ChannelFacts};
use super::channel_alarms::{check_channel_alarms, check_health};

const MAX_BLOCK: usize = 1 << 20;
const MIN_BLOCK: usize = 16;

/// Every `[[channel]]`: at least one, names unique, each source input read
/// by one channel only.
pub(super) fn check_channels(
    issues: &mut Issues,
    raw: &RawConfig,
    sources: &[SourceSpec],
) -> Vec<ChannelSpec> {
    let by_name: HashMap<&str, &SourceSpec> =
        sources.iter().map(|s| (s.name.as_str(), s)).collect();
    let mut channels = Vec::new();
    let mut names = HashSet::new();
    let mut used_inputs: HashMap<(String, usize), String> = HashMap::new();
    if raw.channels.is_empty() {
        issues.add("channel", "at least one [[channel]] is required");
    }
    for (i, c) in raw.channels.iter().enumerate() {
        let path = format!("channel {:?}", c.name);
        if c.name.is_empty() {
            issues.add(format!("channel[{i}].name"), "must not be empty");
        }
        if !names.insert(c.name.clone()) {
            issues.add(
                format!("{path}.name"),
                "duplicate channel name (names must be unique)",
            );
        }
        let source = by_name.get(c.source.as_str()).copied();
        check_input(issues, &path, c, source, &mut used_inputs);
        if let Some(spec) = check_channel(issues, &path, c, source, &raw.machines) {
            channels.push(spec);
        }
    }
    channels
}

/// The source a channel reads and its input index there.
fn check_input(
    issues: &mut Issues,
    path: &str,
    c: &RawChannel,
    source: Option<&SourceSpec>,
    used_inputs: &mut HashMap<(String, usize), String>,
) {
    let Some(s) = source else {
        issues.add(
            format!("{path}.source"),
            format!("unknown source {:?}", c.source),
        );
        return;
    };
    if c.index >= s.channels {
        issues.add(
            format!("{path}.index"),
            format!(
                "{} is past the last channel of source {:?} (it has {}, numbered from 0)",
                c.index, s.name, s.channels
            ),
        );
    }
    if let Some(other) = used_inputs.insert((c.source.clone(), c.index), c.name.clone()) {
        issues.add(
            format!("{path}.index"),
            format!(
                "input {} of source {:?} is already taken by channel {other:?}",
                c.index, c.source
            ),
        );
    }
}

/// The rest of one channel, after its name and input. `None` when the
/// channel cannot be built (no known unit or source); its issues are added.
fn check_channel(
    issues: &mut Issues,
    path: &str,
    c: &RawChannel,
    source: Option<&SourceSpec>,
    machines: &[RawMachine],
) -> Option<ChannelSpec> {
    let fs = source.map_or(f64::NAN, |s| s.sample_rate_hz);
    let unit = parse_unit(issues, &format!("{path}.unit"), &c.unit);
    let scale = check_scaling(issues, path, c);
    let (nfft, hop) = check_blocks(issues, path, c);
    check_averaging(issues, path, &c.averaging);
    check_low_cut(issues, path, c.integration_low_cut_hz, fs);
    let machine = find_machine(issues, path, c.machine.as_deref(), machines);
    let envelope = c.envelope.map(|e| check_envelope(issues, path, e, fs));

    let facts = ChannelFacts {
        unit,
        fs,
        df: fs / nfft as f64,
        has_envelope: c.envelope.is_some(),
        machine,
    };
    let bands = check_bands(issues, path, &c.bands, &facts);
    let health = check_health(issues, path, c.health.as_ref());
    let alarms = check_channel_alarms(issues, path, c, unit, &bands);

    let (Some(unit), Some(s)) = (unit, source) else {
        return None;
    };
    Some(ChannelSpec {
        name: c.name.clone(),
        source: c.source.clone(),
        index: c.index,
        unit,
        scale,
        offset: c.offset,
        sample_rate_hz: s.sample_rate_hz,
        block: c.block,
        nfft,
        hop,
        overlap: c.overlap,
        window: c.window,
        detrend: c.detrend,
        averaging: c.averaging.mode,
        average_count: c.averaging.count,
        integration_low_cut_hz: c.integration_low_cut_hz,
        machine: c.machine.clone(),
        envelope,
        bands,
        health,
        alarms,
    })
}

/// A unit symbol (`path` is the field's own path).
pub(super) fn parse_unit(issues: &mut Issues, path: &str, text: &str) -> Option<Unit> {
    let unit = Unit::parse(text);
    if unit.is_none() {
        issues.add(
            path,
            format!("unknown unit {text:?} (known: {})", Unit::known()),
        );
    }
    unit
}

/// `scale`, or `volts_per_count` with `sensitivity_v_per_unit`; and `offset`.
fn check_scaling(issues: &mut Issues, path: &str, c: &RawChannel) -> f64 {
    let scale = match (c.scale, c.volts_per_count, c.sensitivity_v_per_unit) {
        (Some(_), Some(_), _) | (Some(_), _, Some(_)) => {
            issues.add(
                format!("{path}.scale"),
                "give either scale, or volts_per_count with sensitivity_v_per_unit, not both",
            );
            1.0
        }
        (Some(s), None, None) => s,
        (None, Some(v), Some(s)) => {
            if !(s.is_finite() && s != 0.0) {
                issues.add(
                    format!("{path}.sensitivity_v_per_unit"),
                    format!("{s} must be finite and not zero"),
                );
                1.0
            } else {
                v / s
            }
        }
        (None, Some(_), None) => {
            issues.add(
                format!("{path}.sensitivity_v_per_unit"),
                "is required with volts_per_count",
            );
            1.0
        }
        (None, None, Some(_)) => {
            issues.add(
                format!("{path}.volts_per_count"),
                "is required with sensitivity_v_per_unit",
            );
            1.0
        }
        (None, None, None) => 1.0,
    };
    if !(scale.is_finite() && scale != 0.0) {
        issues.add(
            format!("{path}.scale"),
            format!("{scale} must be finite and not zero"),
        );
    }
    if !c.offset.is_finite() {
        issues.add(format!("{path}.offset"), "must be finite");
    }
    scale
}

/// `block`, `nfft` and `overlap`; returns (nfft, hop).
fn check_blocks(issues: &mut Issues, path: &str, c: &RawChannel) -> (usize, usize) {
    if !(MIN_BLOCK..=MAX_BLOCK).contains(&c.block) {
        issues.add(
            format!("{path}.block"),
            format!("{} is out of range {MIN_BLOCK} to {MAX_BLOCK}", c.block),
        );
    }
    let nfft = c.nfft.unwrap_or(c.block);
    if nfft < c.block {
        issues.add(
            format!("{path}.nfft"),
            format!(
                "{nfft} is shorter than block {} (nfft must be >= block; the rest is zero-padded)",
                c.block
            ),
        );
    } else if nfft > 4 * MAX_BLOCK {
        issues.add(
            format!("{path}.nfft"),
            format!("{nfft} is larger than {}", 4 * MAX_BLOCK),
        );
    }
    if !nfft.is_multiple_of(2) {
        issues.add(format!("{path}.nfft"), format!("{nfft} must be even"));
    }
    if !(c.overlap.is_finite() && (0.0..=0.95).contains(&c.overlap)) {
        issues.add(
            format!("{path}.overlap"),
            format!("{} is out of range 0 to 0.95", c.overlap),
        );
    }
    let hop = ((c.block as f64) * (1.0 - c.overlap.clamp(0.0, 0.95))).round() as usize;
    (nfft, hop.clamp(1, c.block.max(1)))
}

/// `averaging`: the block count.
fn check_averaging(issues: &mut Issues, path: &str, a: &RawAveraging) {
    if !(1..=100_000).contains(&a.count) {
        issues.add(
            format!("{path}.averaging.count"),
            format!("{} is out of range 1 to 100000", a.count),
        );
    }
}

/// `integration_low_cut_hz`: above 0, below Nyquist.
fn check_low_cut(issues: &mut Issues, path: &str, low_cut_hz: f64, fs: f64) {
    let nyquist = fs / 2.0;
    if !(low_cut_hz.is_finite() && low_cut_hz > 0.0) {
        issues.add(
            format!("{path}.integration_low_cut_hz"),
            format!("{low_cut_hz} must be above 0 Hz"),
        );
    } else if low_cut_hz >= nyquist {
        issues.add(
            format!("{path}.integration_low_cut_hz"),
            format!("{low_cut_hz} Hz is not below Nyquist {nyquist} Hz"),
        );
    }
}

/// `machine`: the `[[machine]]` it names, when it exists.
fn find_machine<'a>(
    issues: &mut Issues,
    path: &str,
    name: Option<&str>,
    machines: &'a [RawMachine],
) -> Option<&'a RawMachine> {
    let m = name?;
    let found = machines.iter().find(|x| x.name == m);
    if found.is_none() {
        issues.add(format!("{path}.machine"), format!("unknown machine {m:?}"));
    }
    found
}

/// `envelope`: 0 < lo_hz < hi_hz <= Nyquist.
fn check_envelope(issues: &mut Issues, path: &str, e: RawEnvelope, fs: f64) -> (f64, f64) {
    let nyquist = fs / 2.0;
    if !(e.lo_hz.is_finite() && e.hi_hz.is_finite() && e.lo_hz > 0.0 && e.lo_hz < e.hi_hz) {
        issues.add(
            format!("{path}.envelope"),
            format!("{}–{} Hz: need 0 < lo_hz < hi_hz", e.lo_hz, e.hi_hz),
        );
    } else if fs.is_finite() && e.hi_hz > nyquist {
        issues.add(
            format!("{path}.envelope.hi_hz"),
            format!("{} Hz is above Nyquist {nyquist} Hz", e.hi_hz),
        );
    }
    (e.lo_hz, e.hi_hz)
}

#[cfg(test)]
mod tests {
    use super::*;

    fn channel(extra: &str) -> RawChannel {
        let text = format!("name = \"a\"\nsource = \"sim\"\nindex = 0\nunit = \"g\"\n{extra}");
        toml::from_str(&text).unwrap_or_else(|e| panic!("{text}: {e}"))
    }

    #[test]
    fn blocks_nfft_and_overlap() {
        let mut issues = Issues::default();
        check_blocks(
            &mut issues,
            "c",
            &channel("block = 8\nnfft = 7\noverlap = 0.99"),
        );
        assert_eq!(
            issues.pairs(),
            vec![
                ("c.block", "8 is out of range 16 to 1048576"),
                (
                    "c.nfft",
                    "7 is shorter than block 8 (nfft must be >= block; the rest is zero-padded)"
                ),
                ("c.nfft", "7 must be even"),
                ("c.overlap", "0.99 is out of range 0 to 0.95"),
            ]
        );

        let mut issues = Issues::default();
        let got = check_blocks(
            &mut issues,
            "c",
            &channel("block = 4096\nnfft = 8192\noverlap = 0.75"),
        );
        assert_eq!(got, (8192, 1024));
        assert!(issues.is_empty(), "{issues:?}");
    }

    #[test]
    fn scaling_from_sensitivity() {
        let mut issues = Issues::default();
        let c = channel("volts_per_count = 0.001");
        assert_eq!(check_scaling(&mut issues, "c", &c), 1.0);
        assert_eq!(
            issues.pairs(),
            vec![(
                "c.sensitivity_v_per_unit",
                "is required with volts_per_count"
            )]
        );

        let mut issues = Issues::default();
        let c = channel("volts_per_count = 0.001\nsensitivity_v_per_unit = 0.1");
        let scale = check_scaling(&mut issues, "c", &c);
        assert!((scale - 0.01).abs() < 1e-15, "{scale}");
        assert!(issues.is_empty(), "{issues:?}");
    }

    #[test]
    fn envelope_and_low_cut_against_nyquist() {
        let mut issues = Issues::default();
        let e = RawEnvelope {
            lo_hz: 500.0,
            hi_hz: 600.0,
        };
        check_envelope(&mut issues, "c", e, 1000.0);
        check_low_cut(&mut issues, "c", 500.0, 1000.0);
        assert_eq!(
            issues.pairs(),
            vec![
                ("c.envelope.hi_hz", "600 Hz is above Nyquist 500 Hz"),
                (
                    "c.integration_low_cut_hz",
                    "500 Hz is not below Nyquist 500 Hz"
                ),
            ]
        );

        let mut issues = Issues::default();
        check_envelope(&mut issues, "c", e, 25_600.0);
        check_low_cut(&mut issues, "c", 2.0, 25_600.0);
        assert!(issues.is_empty(), "{issues:?}");
    }

    #[test]
    fn unknown_unit_names_the_field() {
        let mut issues = Issues::default();
        assert_eq!(parse_unit(&mut issues, "c.unit", "furlong"), None);
        assert_eq!(
            issues.pairs(),
            vec![(
                "c.unit",
                format!("unknown unit \"furlong\" (known: {})", Unit::known()).as_str()
            )]
        );
        let mut issues = Issues::default();
        assert!(parse_unit(&mut issues, "c.unit", "mm/s").is_some());
        assert!(issues.is_empty(), "{issues:?}");
    }
}
