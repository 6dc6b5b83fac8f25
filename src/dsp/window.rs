//! Analysis windows and their figures of merit.
//!
//! All windows are generated *periodic* (DFT-even: w[n] for n = 0..N−1 of a
//! length-N+1 symmetric window, last point dropped), which is what spectral
//! analysis wants and what `scipy.signal.get_window` returns by default.
//! Each is a sum of cosines w[n] = Σ_k (−1)^k a_k cos(2πkn/N).

pub use crate::config::WindowKind;

/// The window functions' formulas (the kind itself is config vocabulary).
impl WindowKind {
    /// Cosine-sum coefficients a_k.
    pub fn coefficients(self) -> &'static [f64] {
        match self {
            WindowKind::Rectangular => &[1.0],
            WindowKind::Hann => &[0.5, 0.5],
            WindowKind::Hamming => &[0.54, 0.46],
            WindowKind::BlackmanHarris => &[0.35875, 0.48829, 0.14128, 0.01168],
            WindowKind::FlatTop => &[
                0.215_578_95,
                0.416_631_58,
                0.277_263_158,
                0.083_578_947,
                0.006_947_368,
            ],
        }
    }
}

/// A window of a given length with its sums precomputed.
#[derive(Debug, Clone)]
pub struct Window {
    pub kind: WindowKind,
    pub coeffs: Vec<f32>,
    /// Σ w[n]
    pub sum: f64,
    /// Σ w[n]²
    pub sum_sq: f64,
}

impl Window {
    pub fn new(kind: WindowKind, n: usize) -> Window {
        let coeffs: Vec<f32> = (0..n).map(|i| value(kind, i, n) as f32).collect();
        let sum = coeffs.iter().map(|&w| w as f64).sum();
        let sum_sq = coeffs.iter().map(|&w| (w as f64) * (w as f64)).sum();
        Window {
            kind,
            coeffs,
            sum,
            sum_sq,
        }
    }

    pub fn len(&self) -> usize {
        self.coeffs.len()
    }

    pub fn is_empty(&self) -> bool {
        self.coeffs.is_empty()
    }

    /// Coherent gain Σw/N: the amplitude a tone on a line is read at
    /// before correction.
    pub fn coherent_gain(&self) -> f64 {
        self.sum / self.len() as f64
    }

    /// Equivalent noise bandwidth in lines of fs/N: N·Σw²/(Σw)².
    pub fn enbw_bins(&self) -> f64 {
        self.len() as f64 * self.sum_sq / (self.sum * self.sum)
    }
}

/// Window value at sample `i` of a periodic window of length `n`.
pub fn value(kind: WindowKind, i: usize, n: usize) -> f64 {
    let x = 2.0 * std::f64::consts::PI * i as f64 / n as f64;
    kind.coefficients()
        .iter()
        .enumerate()
        .map(|(k, a)| {
            let sign = if k % 2 == 0 { 1.0 } else { -1.0 };
            sign * a * (k as f64 * x).cos()
        })
        .sum()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn hann_is_periodic_and_starts_at_zero() {
        let w = Window::new(WindowKind::Hann, 8);
        assert!(w.coeffs[0].abs() < 1e-7);
        assert!((w.coeffs[4] - 1.0).abs() < 1e-7);
        // Periodic: w[1] == w[7].
        assert!((w.coeffs[1] - w.coeffs[7]).abs() < 1e-7);
    }

    #[test]
    fn figures_of_merit() {
        // REFERENCES.md window table (Harris 1978 Table 1, recomputed with
        // scipy for these exact coefficients), N = 4096, periodic.
        let table = [
            (WindowKind::Rectangular, 1.000, 1.000),
            (WindowKind::Hann, 0.500, 1.500),
            (WindowKind::Hamming, 0.540, 1.363),
            (WindowKind::BlackmanHarris, 0.359, 2.004),
            (WindowKind::FlatTop, 0.2156, 3.770),
        ];
        for (kind, cg, enbw) in table {
            let w = Window::new(kind, 4096);
            assert!(
                (w.coherent_gain() - cg).abs() < 1e-3,
                "{kind:?} CG {}",
                w.coherent_gain()
            );
            assert!(
                (w.enbw_bins() - enbw).abs() < 1.5e-3,
                "{kind:?} ENBW {}",
                w.enbw_bins()
            );
        }
    }
}
