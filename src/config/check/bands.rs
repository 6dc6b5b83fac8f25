//! Checks of a channel's `[[channel.band]]` tables: names, edges (fixed Hz,
//! orders of running speed, or a bearing defect of the channel's machine),
//! unit and spectrum, into `BandSpec`s.

use std::collections::HashSet;

use crate::config::bearing::BearingGeometry;
use crate::config::issue::Issues;
use crate::config::kinds::SpectrumKind;
use crate::config::raw::{RawBand, RawMachine};
use crate::config::spec::{BandEdges, BandSpec};
use crate::units::{convertible, Unit};

use super::channels::parse_unit;

/// What a band's checks need to know of its channel.
pub(super) struct ChannelFacts<'a> {
    /// The channel's unit, when it is a known one.
    pub unit: Option<Unit>,
    /// Sample rate of the channel's source (NaN when the source is unknown).
    pub fs: f64,
    /// Line spacing, fs / nfft.
    pub df: f64,
    /// Whether the channel has `[channel.envelope]`.
    pub has_envelope: bool,
    /// The channel's machine, when it names a known one.
    pub machine: Option<&'a RawMachine>,
}

/// Every band of one channel; names unique within the channel. Bands that
/// fail are left out of the result (their issues are added).
pub(super) fn check_bands(
    issues: &mut Issues,
    path: &str,
    raw: &[RawBand],
    ch: &ChannelFacts,
) -> Vec<BandSpec> {
    let mut bands = Vec::new();
    let mut names = HashSet::new();
    for (j, b) in raw.iter().enumerate() {
        let bpath = format!("{path} band {:?}", b.name);
        if b.name.is_empty() {
            issues.add(format!("{path} band[{j}].name"), "must not be empty");
        }
        if !names.insert(b.name.clone()) {
            issues.add(
                format!("{bpath}.name"),
                "duplicate band name in this channel",
            );
        }
        if let Some(spec) = check_band(issues, &bpath, b, ch) {
            bands.push(spec);
        }
    }
    bands
}

/// One band after its name: edges, unit, spectrum.
fn check_band(
    issues: &mut Issues,
    bpath: &str,
    b: &RawBand,
    ch: &ChannelFacts,
) -> Option<BandSpec> {
    let edges = band_edges(issues, bpath, b, ch.fs, ch.df, ch.machine);
    let band_unit = match &b.unit {
        None => ch.unit,
        Some(s) => parse_unit(issues, &format!("{bpath}.unit"), s),
    };
    if let (Some(cu), Some(bu)) = (ch.unit, band_unit) {
        if !convertible(cu, bu) {
            issues.add(
                format!("{bpath}.unit"),
                format!(
                    "{} ({}) cannot be derived from the channel's {} ({})",
                    bu,
                    bu.quantity.as_str(),
                    cu,
                    cu.quantity.as_str()
                ),
            );
        }
    }
    if b.spectrum == SpectrumKind::Envelope {
        if !ch.has_envelope {
            issues.add(
                format!("{bpath}.spectrum"),
                "reads the envelope spectrum, but the channel has no [channel.envelope]",
            );
        }
        if let (Some(cu), Some(bu)) = (ch.unit, band_unit) {
            if cu.quantity != bu.quantity {
                issues.add(
                    format!("{bpath}.unit"),
                    format!(
                        "an envelope band is in the channel's quantity ({}), not {bu}",
                        cu.quantity.as_str()
                    ),
                );
            }
        }
    }
    Some(BandSpec {
        name: b.name.clone(),
        edges: edges?,
        measure: b.measure,
        unit: band_unit?,
        spectrum: b.spectrum,
        bearing: b.bearing.clone().zip(b.defect),
    })
}

/// A band's edges: exactly one of fixed Hz, orders, or a bearing defect.
fn band_edges(
    issues: &mut Issues,
    bpath: &str,
    b: &RawBand,
    fs: f64,
    df: f64,
    machine: Option<&RawMachine>,
) -> Option<BandEdges> {
    let given = [
        b.lo_hz.is_some() || b.hi_hz.is_some(),
        b.orders.is_some(),
        b.bearing.is_some(),
    ];
    if given.iter().filter(|g| **g).count() != 1 {
        issues.add(
            bpath.to_string(),
            "give exactly one of lo_hz/hi_hz, orders, or bearing (with defect)",
        );
        return None;
    }
    if b.harmonics != 1 && b.bearing.is_none() {
        issues.add(
            format!("{bpath}.harmonics"),
            "only applies to bearing bands",
        );
    }
    if b.width_orders.is_some() && b.bearing.is_none() {
        issues.add(
            format!("{bpath}.width_orders"),
            "only applies to bearing bands",
        );
    }
    if b.defect.is_some() && b.bearing.is_none() {
        issues.add(format!("{bpath}.defect"), "needs bearing");
    }
    if let (Some(lo), Some(hi)) = (b.lo_hz, b.hi_hz) {
        return hz_edges(issues, bpath, lo, hi, fs, df);
    }
    if b.lo_hz.is_some() != b.hi_hz.is_some() {
        issues.add(bpath.to_string(), "lo_hz and hi_hz go together");
        return None;
    }
    let Some(m) = machine else {
        issues.add(
            bpath.to_string(),
            "an order or bearing band needs the channel's `machine`",
        );
        return None;
    };
    if let Some([lo, hi]) = b.orders {
        if !(lo.is_finite() && hi.is_finite() && lo >= 0.0 && lo < hi) {
            issues.add(
                format!("{bpath}.orders"),
                format!("[{lo}, {hi}]: need 0 <= lo < hi"),
            );
            return None;
        }
        return Some(BandEdges::Orders {
            windows: vec![(lo, hi)],
        });
    }
    bearing_edges(issues, bpath, b, m)
}

/// Fixed edges in Hz: ordered, below Nyquist, holding at least one line.
fn hz_edges(
    issues: &mut Issues,
    bpath: &str,
    lo: f64,
    hi: f64,
    fs: f64,
    df: f64,
) -> Option<BandEdges> {
    let nyquist = fs / 2.0;
    if !(lo.is_finite() && lo >= 0.0) {
        issues.add(format!("{bpath}.lo_hz"), format!("{lo} must be >= 0 Hz"));
        return None;
    }
    if !hi.is_finite() {
        issues.add(format!("{bpath}.hi_hz"), "must be finite");
        return None;
    }
    if lo >= hi {
        issues.add(
            format!("{bpath}.lo_hz"),
            format!("{lo} Hz is not below hi_hz {hi} Hz (lo must be < hi)"),
        );
        return None;
    }
    if fs.is_finite() && hi > nyquist {
        issues.add(
            format!("{bpath}.hi_hz"),
            format!("{hi} Hz is above Nyquist {nyquist} Hz (a tone above Nyquist folds back; filter it out before the converter)"),
        );
        return None;
    }
    if df.is_finite() && (lo / df).ceil() > (hi / df).floor() {
        issues.add(
            bpath.to_string(),
            format!("{lo}–{hi} Hz holds no spectral line (lines are {df:.4} Hz apart); widen it or raise nfft"),
        );
        return None;
    }
    Some(BandEdges::Hz { lo, hi })
}

/// A bearing band: windows in orders around each harmonic of the defect.
fn bearing_edges(
    issues: &mut Issues,
    bpath: &str,
    b: &RawBand,
    m: &RawMachine,
) -> Option<BandEdges> {
    let name = b.bearing.as_deref().unwrap_or_default();
    let Some(bearing) = m.bearings.iter().find(|x| x.name == name) else {
        issues.add(
            format!("{bpath}.bearing"),
            format!("machine {:?} has no bearing {name:?}", m.name),
        );
        return None;
    };
    let Some(defect) = b.defect else {
        issues.add(
            format!("{bpath}.defect"),
            "is required with bearing (bpfo, bpfi, bsf, ftf)",
        );
        return None;
    };
    let width = b.width_orders.unwrap_or(0.1);
    if !(width.is_finite() && width > 0.0) {
        issues.add(
            format!("{bpath}.width_orders"),
            format!("{width} must be above 0"),
        );
        return None;
    }
    if !(1..=50).contains(&b.harmonics) {
        issues.add(
            format!("{bpath}.harmonics"),
            format!("{} is out of range 1 to 50", b.harmonics),
        );
        return None;
    }
    let g = BearingGeometry {
        elements: bearing.elements,
        element_diameter: bearing.element_diameter_mm,
        pitch_diameter: bearing.pitch_diameter_mm,
        contact_angle_deg: bearing.contact_angle_deg,
    };
    let centre = g.order_of(defect);
    let windows = (1..=b.harmonics)
        .map(|h| {
            let c = centre * h as f64;
            ((c - width / 2.0).max(0.0), c + width / 2.0)
        })
        .collect();
    Some(BandEdges::Orders { windows })
}

#[cfg(test)]
mod tests {
    use super::*;

    fn band(text: &str) -> RawBand {
        let text = format!("name = \"b\"\n{text}");
        toml::from_str(&text).unwrap_or_else(|e| panic!("{text}: {e}"))
    }

    fn facts(machine: Option<&RawMachine>) -> ChannelFacts<'_> {
        ChannelFacts {
            unit: Unit::parse("g"),
            fs: 25_600.0,
            df: 25_600.0 / 8192.0,
            has_envelope: false,
            machine,
        }
    }

    #[test]
    fn band_above_nyquist() {
        let mut issues = Issues::default();
        let got = check_bands(
            &mut issues,
            "c",
            &[band("lo_hz = 10\nhi_hz = 20000")],
            &facts(None),
        );
        assert!(got.is_empty());
        assert_eq!(
            issues.pairs(),
            vec![(
                "c band \"b\".hi_hz",
                "20000 Hz is above Nyquist 12800 Hz (a tone above Nyquist folds back; filter it out before the converter)"
            )]
        );
    }

    #[test]
    fn order_band_needs_a_machine_and_envelope_band_an_envelope() {
        let mut issues = Issues::default();
        let raw = [
            band("orders = [0.5, 1.5]"),
            band("lo_hz = 10\nhi_hz = 1000\nspectrum = \"envelope\""),
        ];
        check_bands(&mut issues, "c", &raw, &facts(None));
        assert_eq!(
            issues.pairs(),
            vec![
                (
                    "c band \"b\"",
                    "an order or bearing band needs the channel's `machine`"
                ),
                ("c band \"b\".name", "duplicate band name in this channel"),
                (
                    "c band \"b\".spectrum",
                    "reads the envelope spectrum, but the channel has no [channel.envelope]"
                ),
            ]
        );
    }

    #[test]
    fn good_bands_have_no_issue() {
        let machine: RawMachine = toml::from_str(
            "name = \"p2\"\nspeed = { kind = \"fixed\", rpm = 1480 }\n\
             [[bearing]]\nname = \"de\"\nelements = 9\nelement_diameter_mm = 12\npitch_diameter_mm = 60\n",
        )
        .unwrap_or_else(|e| panic!("{e}"));
        let raw = [
            band("lo_hz = 10\nhi_hz = 1000\nunit = \"mm/s\""),
            RawBand {
                name: "o".into(),
                ..band("orders = [0.5, 1.5]")
            },
            RawBand {
                name: "bpfo".into(),
                ..band("bearing = \"de\"\ndefect = \"bpfo\"\nharmonics = 3")
            },
        ];
        let mut issues = Issues::default();
        let got = check_bands(&mut issues, "c", &raw, &facts(Some(&machine)));
        assert!(issues.is_empty(), "{issues:?}");
        assert_eq!(got.len(), 3);
        match &got[2].edges {
            BandEdges::Orders { windows } => assert_eq!(windows.len(), 3),
            other => panic!("bearing band edges: {other:?}"),
        }
    }
}
