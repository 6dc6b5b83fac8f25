//! Vector instructions for the crate's own hot loops, chosen at run time.
//!
//! The release build targets baseline x86-64 (SSE2), so that one binary
//! runs on any plant PC; rustfft picks its AVX code at run time, and these
//! loops do the same through `pulp`: [`vectorized`] runs a closure inside a
//! function compiled for AVX2 + FMA (or AVX-512 where present), so the
//! compiler auto-vectorises the loop with the wider registers. Without
//! those features the closure runs as plain code.
//!
//! The results do not depend on the instructions chosen: the compiler keeps
//! the order of floating-point operations (no fast-math, no fused
//! multiply-add contraction), so every lane computes exactly what the
//! scalar loop would. Only loops whose body is inside the closure (or in
//! `#[inline(always)]` functions it calls) get the wider code.

use std::sync::OnceLock;

fn arch() -> pulp::Arch {
    static ARCH: OnceLock<pulp::Arch> = OnceLock::new();
    *ARCH.get_or_init(pulp::Arch::new)
}

/// Runs `f` compiled for the best vector instructions this CPU has.
#[inline(always)]
pub fn vectorized<R>(f: impl FnOnce() -> R) -> R {
    arch().dispatch(f)
}

/// Samples per f32 partial sum before it is added into f64: each lane of
/// an f32 partial then sums at most 32 values (8 lanes), so its relative
/// rounding error stays below about 32 · 2⁻²⁴ ≈ 2e-6.
const FLUSH: usize = 256;

/// Sums and extremes of a run of samples about a shift `c`.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Moments {
    /// Σ (x − c)
    pub sum: f64,
    /// Σ (x − c)²
    pub sum2: f64,
    pub min: f32,
    pub max: f32,
}

/// [`Moments`] of `x` about `c`, in vector lanes of f32 flushed into f64
/// every [`FLUSH`] samples. For an empty `x`: zero sums, min +∞, max −∞.
pub fn moments(x: &[f32], c: f32) -> Moments {
    struct Op<'a>(&'a [f32], f32);
    impl pulp::WithSimd for Op<'_> {
        type Output = Moments;
        #[inline(always)]
        fn with_simd<S: pulp::Simd>(self, simd: S) -> Moments {
            let Op(x, c) = self;
            let mut out = Moments {
                sum: 0.0,
                sum2: 0.0,
                min: f32::INFINITY,
                max: f32::NEG_INFINITY,
            };
            let vc = simd.splat_f32s(c);
            let mut lo = simd.splat_f32s(f32::INFINITY);
            let mut hi = simd.splat_f32s(f32::NEG_INFINITY);
            for block in x.chunks(FLUSH) {
                let (head, tail) = S::as_simd_f32s(block);
                let mut s = simd.splat_f32s(0.0);
                let mut s2 = simd.splat_f32s(0.0);
                for &v in head {
                    let d = simd.sub_f32s(v, vc);
                    s = simd.add_f32s(s, d);
                    s2 = simd.add_f32s(s2, simd.mul_f32s(d, d));
                    lo = simd.min_f32s(lo, v);
                    hi = simd.max_f32s(hi, v);
                }
                let (mut ts, mut ts2) = (0f32, 0f32);
                for &v in tail {
                    let d = v - c;
                    ts += d;
                    ts2 += d * d;
                    out.min = out.min.min(v);
                    out.max = out.max.max(v);
                }
                out.sum += f64::from(simd.reduce_sum_f32s(s)) + f64::from(ts);
                out.sum2 += f64::from(simd.reduce_sum_f32s(s2)) + f64::from(ts2);
            }
            out.min = out.min.min(simd.reduce_min_f32s(lo));
            out.max = out.max.max(simd.reduce_max_f32s(hi));
            out
        }
    }
    arch().dispatch(Op(x, c))
}

/// Σ p[k]·w[k] (f32 lanes flushed into f64) and the largest product.
pub fn weighted_sum_max(p: &[f32], w: &[f32]) -> (f64, f32) {
    struct Op<'a>(&'a [f32], &'a [f32]);
    impl pulp::WithSimd for Op<'_> {
        type Output = (f64, f32);
        #[inline(always)]
        fn with_simd<S: pulp::Simd>(self, simd: S) -> (f64, f32) {
            let n = self.0.len().min(self.1.len());
            let (p, w) = (&self.0[..n], &self.1[..n]);
            let (mut sum, mut top) = (0f64, f32::NEG_INFINITY);
            let mut vtop = simd.splat_f32s(f32::NEG_INFINITY);
            for (pb, wb) in p.chunks(FLUSH).zip(w.chunks(FLUSH)) {
                let ((ph, pt), (wh, wt)) = (S::as_simd_f32s(pb), S::as_simd_f32s(wb));
                let mut s = simd.splat_f32s(0.0);
                for (&a, &b) in ph.iter().zip(wh) {
                    let v = simd.mul_f32s(a, b);
                    s = simd.add_f32s(s, v);
                    vtop = simd.max_f32s(vtop, v);
                }
                let mut ts = 0f32;
                for (&a, &b) in pt.iter().zip(wt) {
                    let v = a * b;
                    ts += v;
                    top = top.max(v);
                }
                sum += f64::from(simd.reduce_sum_f32s(s)) + f64::from(ts);
            }
            (sum, top.max(simd.reduce_max_f32s(vtop)))
        }
    }
    arch().dispatch(Op(p, w))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn vectorized_loop_matches_the_plain_loop_bit_for_bit() {
        // The same products and sums in the same order must give the same
        // bits whatever the instruction set (IEEE 754 arithmetic).
        let x: Vec<f32> = (0..4099)
            .map(|i| ((i * 7919) % 1000) as f32 * 1e-3 - 0.5)
            .collect();
        let w: Vec<f32> = (0..4099).map(|i| (i as f32 * 0.001).sin()).collect();
        let plain: Vec<f32> = x.iter().zip(&w).map(|(a, b)| (a - 0.25) * b).collect();
        let mut fast = vec![0f32; x.len()];
        vectorized(|| {
            for ((d, a), b) in fast.iter_mut().zip(&x).zip(&w) {
                *d = (a - 0.25) * b;
            }
        });
        assert!(plain
            .iter()
            .zip(&fast)
            .all(|(a, b)| a.to_bits() == b.to_bits()));
    }

    #[test]
    fn moments_agree_with_f64_sums() {
        // Sums in f64 of the same values are the reference; the f32 lanes
        // must agree to their stated error bound (2e-6 relative).
        let x: Vec<f32> = (0..10_007)
            .map(|i| 3.0 + ((i * 7919) % 1013) as f32 * 1e-3)
            .collect();
        let c = 3.1f32;
        let m = moments(&x, c);
        let s: f64 = x.iter().map(|&v| f64::from(v - c)).sum();
        let s2: f64 = x.iter().map(|&v| f64::from(v - c).powi(2)).sum();
        assert!(
            (m.sum - s).abs() <= 2e-6 * x.iter().map(|&v| f64::from((v - c).abs())).sum::<f64>()
        );
        assert!((m.sum2 / s2 - 1.0).abs() < 2e-6, "{} vs {s2}", m.sum2);
        let lo = x.iter().cloned().fold(f32::INFINITY, f32::min);
        let hi = x.iter().cloned().fold(f32::NEG_INFINITY, f32::max);
        assert_eq!((m.min, m.max), (lo, hi));
        let e = moments(&[], 0.0);
        assert_eq!(
            (e.sum, e.sum2, e.min, e.max),
            (0.0, 0.0, f32::INFINITY, f32::NEG_INFINITY)
        );
    }

    #[test]
    fn weighted_sum_max_agrees_with_f64_sums() {
        let p: Vec<f32> = (0..4097).map(|i| ((i * 31) % 97) as f32 * 1e-4).collect();
        let w: Vec<f32> = (0..4097).map(|i| 1.0 / (1.0 + i as f32)).collect();
        let (s, top) = weighted_sum_max(&p, &w);
        let s64: f64 = p.iter().zip(&w).map(|(&a, &b)| f64::from(a * b)).sum();
        let top64 = p
            .iter()
            .zip(&w)
            .map(|(&a, &b)| a * b)
            .fold(f32::NEG_INFINITY, f32::max);
        assert!((s / s64 - 1.0).abs() < 2e-6);
        assert_eq!(top, top64);
    }
}
