//! Engineering units: parsing the unit strings of the config, converting to
//! SI base units for metrics, and the frequency-domain factor that turns one
//! kinematic quantity into another (acceleration -> velocity -> displacement).
//!
//! Unit policy: the config and the JSON API speak the trade's units (g, mm/s,
//! µm, in/s …); `/metrics` always speaks SI base units, with the unit in the
//! metric name, as the Prometheus naming guide asks.

use std::f64::consts::PI;
use std::fmt;

/// Standard gravity, exact by definition (3rd CGPM, 1901).
pub const STANDARD_GRAVITY: f64 = 9.80665;
/// One inch in metres, exact by definition (international yard and pound, 1959).
pub const INCH: f64 = 0.0254;

/// The physical quantity a channel or band measures.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum Quantity {
    Displacement,
    Velocity,
    Acceleration,
    Voltage,
    Current,
    Pressure,
}

impl Quantity {
    /// Time-derivative order for the kinematic family (displacement 0,
    /// velocity 1, acceleration 2); `None` for quantities that cannot be
    /// integrated into one another.
    pub fn kinematic_order(self) -> Option<i32> {
        match self {
            Quantity::Displacement => Some(0),
            Quantity::Velocity => Some(1),
            Quantity::Acceleration => Some(2),
            _ => None,
        }
    }

    /// The SI base unit as it appears at the end of a Prometheus metric name.
    pub fn metric_suffix(self) -> &'static str {
        match self {
            Quantity::Displacement => "meters",
            Quantity::Velocity => "meters_per_second",
            Quantity::Acceleration => "meters_per_second_squared",
            Quantity::Voltage => "volts",
            Quantity::Current => "amperes",
            Quantity::Pressure => "pascals",
        }
    }

    pub fn as_str(self) -> &'static str {
        match self {
            Quantity::Displacement => "displacement",
            Quantity::Velocity => "velocity",
            Quantity::Acceleration => "acceleration",
            Quantity::Voltage => "voltage",
            Quantity::Current => "current",
            Quantity::Pressure => "pressure",
        }
    }
}

/// A unit the config may name, with its factor to the SI base unit.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Unit {
    /// Canonical spelling used in JSON output.
    pub symbol: &'static str,
    pub quantity: Quantity,
    /// Multiply a value in this unit by `to_si` to get the SI base unit.
    pub to_si: f64,
}

const UNITS: &[(&[&str], &str, Quantity, f64)] = &[
    (&["g"], "g", Quantity::Acceleration, STANDARD_GRAVITY),
    (
        &["m/s^2", "m/s²", "m/s2"],
        "m/s^2",
        Quantity::Acceleration,
        1.0,
    ),
    (
        &["mm/s^2", "mm/s²", "mm/s2"],
        "mm/s^2",
        Quantity::Acceleration,
        1e-3,
    ),
    (
        &["in/s^2", "in/s²", "in/s2"],
        "in/s^2",
        Quantity::Acceleration,
        INCH,
    ),
    (&["mm/s"], "mm/s", Quantity::Velocity, 1e-3),
    (&["m/s"], "m/s", Quantity::Velocity, 1.0),
    (&["in/s", "ips"], "in/s", Quantity::Velocity, INCH),
    (&["um", "µm", "μm"], "um", Quantity::Displacement, 1e-6),
    (&["mm"], "mm", Quantity::Displacement, 1e-3),
    (&["m"], "m", Quantity::Displacement, 1.0),
    (&["mil", "mils"], "mil", Quantity::Displacement, INCH * 1e-3),
    (&["in"], "in", Quantity::Displacement, INCH),
    (&["V"], "V", Quantity::Voltage, 1.0),
    (&["mV"], "mV", Quantity::Voltage, 1e-3),
    (&["A"], "A", Quantity::Current, 1.0),
    (&["mA"], "mA", Quantity::Current, 1e-3),
    (&["Pa"], "Pa", Quantity::Pressure, 1.0),
    (&["kPa"], "kPa", Quantity::Pressure, 1e3),
    (&["bar"], "bar", Quantity::Pressure, 1e5),
];

impl Unit {
    /// Looks a unit up by any of its accepted spellings.
    pub fn parse(s: &str) -> Option<Unit> {
        UNITS
            .iter()
            .find(|(names, ..)| names.contains(&s))
            .map(|&(_, symbol, quantity, to_si)| Unit {
                symbol,
                quantity,
                to_si,
            })
    }

    /// Every unit, one entry per canonical symbol, in table order.
    pub fn all() -> impl Iterator<Item = Unit> {
        UNITS.iter().map(|&(_, symbol, quantity, to_si)| Unit {
            symbol,
            quantity,
            to_si,
        })
    }

    /// Every spelling the config accepts, for error messages.
    pub fn known() -> String {
        UNITS
            .iter()
            .map(|(_, symbol, ..)| *symbol)
            .collect::<Vec<_>>()
            .join(", ")
    }

    /// The default unit a band gets when it asks for a quantity by unit
    /// family only (not used by the config today, kept for the API).
    pub fn si(quantity: Quantity) -> Unit {
        let symbol = match quantity {
            Quantity::Displacement => "m",
            Quantity::Velocity => "m/s",
            Quantity::Acceleration => "m/s^2",
            Quantity::Voltage => "V",
            Quantity::Current => "A",
            Quantity::Pressure => "Pa",
        };
        Unit {
            symbol,
            quantity,
            to_si: 1.0,
        }
    }
}

impl fmt::Display for Unit {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(self.symbol)
    }
}

/// Whether a value in `from` can be expressed in `to` (same quantity, or
/// both kinematic so that integration/differentiation applies).
pub fn convertible(from: Unit, to: Unit) -> bool {
    from.quantity == to.quantity
        || (from.quantity.kinematic_order().is_some() && to.quantity.kinematic_order().is_some())
}

/// Amplitude factor that turns a spectral line at `freq_hz` in unit `from`
/// into unit `to`. Integration divides by j·2πf per order and
/// differentiation multiplies by it (common practice: V(f) = A(f)/(j2πf),
/// D(f) = −A(f)/(2πf)²); only the magnitude matters for power spectra.
///
/// Lines below `low_cut_hz` are zeroed when integrating (the 1/f gain would
/// otherwise amplify sensor noise and DC without bound); the DC line is
/// always zero when the orders differ.
pub fn line_factor(from: Unit, to: Unit, freq_hz: f64, low_cut_hz: f64) -> f64 {
    let scale = from.to_si / to.to_si;
    let (Some(a), Some(b)) = (
        from.quantity.kinematic_order(),
        to.quantity.kinematic_order(),
    ) else {
        return scale;
    };
    let steps = a - b; // > 0: integrate; < 0: differentiate
    if steps == 0 {
        return scale;
    }
    if freq_hz <= 0.0 || (steps > 0 && freq_hz < low_cut_hz) {
        return 0.0;
    }
    scale * (2.0 * PI * freq_hz).powi(-steps)
}

#[cfg(test)]
mod tests {
    use super::*;

    fn u(s: &str) -> Unit {
        Unit::parse(s).expect("known unit")
    }

    #[test]
    fn integration_check_values() {
        // Common practice (REFERENCES.md, integration): 1 g RMS at
        // 159.155 Hz (ω = 1000 rad/s) is 9.80665 mm/s RMS and 9.80665 µm RMS.
        let f = 1000.0 / (2.0 * PI);
        let v = line_factor(u("g"), u("mm/s"), f, 1.0);
        assert!((v - 9.80665).abs() < 1e-9, "{v}");
        let d = line_factor(u("g"), u("um"), f, 1.0);
        assert!((d - 9.80665).abs() < 1e-9, "{d}");
        // 1 g RMS at 100 Hz -> 15.608 mm/s, at 10 Hz -> 156.08 mm/s.
        assert!((line_factor(u("g"), u("mm/s"), 100.0, 1.0) - 15.608).abs() < 5e-4);
        assert!((line_factor(u("g"), u("mm/s"), 10.0, 1.0) - 156.08).abs() < 5e-3);
    }

    #[test]
    fn low_cut_and_dc_are_zero_when_integrating() {
        assert_eq!(line_factor(u("g"), u("mm/s"), 0.0, 1.0), 0.0);
        assert_eq!(line_factor(u("g"), u("mm/s"), 4.0, 5.0), 0.0);
        // Same quantity: plain unit conversion, no cut-off.
        assert!((line_factor(u("in/s"), u("mm/s"), 0.0, 5.0) - 25.4).abs() < 1e-12);
    }

    #[test]
    fn spellings_and_families() {
        assert_eq!(u("µm"), u("um"));
        assert!(convertible(u("g"), u("mil")));
        assert!(!convertible(u("g"), u("V")));
        assert!(Unit::parse("furlong").is_none());
    }
}
