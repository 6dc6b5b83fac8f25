//! Machine-aware frequencies: orders of running speed and rolling-element
//! bearing defect frequencies.
//!
//! Bearing formulas (Randall & Antoni, "Rolling element bearing
//! diagnostics — a tutorial", Mech. Syst. Signal Process. 25 (2011)
//! 485–520), with r = (d/D)·cos φ, n rolling elements, all in orders of the
//! shaft speed f_r (inner race turning, outer race fixed):
//!
//! ```text
//! FTF  = ½ (1 − r)          cage (fundamental train)
//! BPFO = (n/2) (1 − r)      outer-race defect
//! BPFI = (n/2) (1 + r)      inner-race defect
//! BSF  = (D/2d) (1 − r²)    ball (roller) spin; a defect on a ball hits
//!                           both races, so its line is often at 2×BSF
//! ```
//!
//! Real bearings run 1–2 % below these because of slip (from memory):
//! bearing bands need some width.

/// Rolling-element bearing geometry.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct BearingGeometry {
    pub elements: u32,
    pub element_diameter: f64,
    pub pitch_diameter: f64,
    pub contact_angle_deg: f64,
}

/// Which defect frequency a bearing band follows.
#[derive(Debug, Clone, Copy, PartialEq, Eq, serde::Deserialize, serde::Serialize)]
#[serde(rename_all = "kebab-case")]
pub enum Defect {
    Bpfo,
    Bpfi,
    Bsf,
    Ftf,
}

impl Defect {
    pub fn as_str(self) -> &'static str {
        match self {
            Defect::Bpfo => "bpfo",
            Defect::Bpfi => "bpfi",
            Defect::Bsf => "bsf",
            Defect::Ftf => "ftf",
        }
    }
}

/// Defect frequencies in orders of shaft speed.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct DefectOrders {
    pub ftf: f64,
    pub bpfo: f64,
    pub bpfi: f64,
    pub bsf: f64,
}

impl BearingGeometry {
    pub fn orders(&self) -> DefectOrders {
        let n = self.elements as f64;
        let r =
            self.element_diameter / self.pitch_diameter * self.contact_angle_deg.to_radians().cos();
        DefectOrders {
            ftf: 0.5 * (1.0 - r),
            bpfo: 0.5 * n * (1.0 - r),
            bpfi: 0.5 * n * (1.0 + r),
            bsf: self.pitch_diameter / (2.0 * self.element_diameter) * (1.0 - r * r),
        }
    }

    pub fn order_of(&self, d: Defect) -> f64 {
        let o = self.orders();
        match d {
            Defect::Bpfo => o.bpfo,
            Defect::Bpfi => o.bpfi,
            Defect::Bsf => o.bsf,
            Defect::Ftf => o.ftf,
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn demo_geometry() {
        // README "What the demo shows": 9 elements, d = 8 mm, D = 40 mm, 0°:
        // r = 0.2, FTF 0.4, BPFO 3.6, BPFI 5.4, BSF 2.4 (orders).
        let g = BearingGeometry {
            elements: 9,
            element_diameter: 8.0,
            pitch_diameter: 40.0,
            contact_angle_deg: 0.0,
        };
        let o = g.orders();
        assert!((o.ftf - 0.4).abs() < 1e-12);
        assert!((o.bpfo - 3.6).abs() < 1e-12);
        assert!((o.bpfi - 5.4).abs() < 1e-12);
        assert!((o.bsf - 2.4).abs() < 1e-12);
    }
}
