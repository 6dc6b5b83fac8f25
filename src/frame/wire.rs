//! Sample readers: interleaved samples, typed or still in little-endian
//! wire bytes (the sample section of a BWF1 frame), read one channel's
//! stretch at a time as `x as f64 * scale + offset` rounded to f32.
//!
//! Pure: bytes or typed slices in, f32 values out. Which rings the values
//! go to, and whether they need the finiteness check, is the source's
//! business (the source layer's `SourceOutputs`).

/// A raw sample as it arrives: integer counts or floating-point values.
pub trait RawSample: Copy {
    /// The largest magnitude a value of this type can have, for integer
    /// types (`None` for floats, which may be anything, NaN included).
    const MAX_ABS: Option<f64>;
    fn to_f64(self) -> f64;
}

impl RawSample for i16 {
    const MAX_ABS: Option<f64> = Some(32768.0);
    fn to_f64(self) -> f64 {
        f64::from(self)
    }
}
impl RawSample for i32 {
    const MAX_ABS: Option<f64> = Some(2_147_483_648.0);
    fn to_f64(self) -> f64 {
        f64::from(self)
    }
}
impl RawSample for f32 {
    const MAX_ABS: Option<f64> = None;
    fn to_f64(self) -> f64 {
        f64::from(self)
    }
}
impl RawSample for f64 {
    const MAX_ABS: Option<f64> = None;
    fn to_f64(self) -> f64 {
        self
    }
}

/// Samples interleaved by instant, read one channel's stretch at a time:
/// a typed slice, or the sample section of a BWF1 frame still in wire
/// bytes (so a frame is scaled straight from the bytes it arrived in).
pub trait Interleaved {
    /// See [`RawSample::MAX_ABS`].
    const MAX_ABS: Option<f64>;
    /// Number of samples (all channels).
    fn count(&self) -> usize;
    /// Fills `out[t]` with sample `start + t * stride`, read as f64 (exact
    /// for every format), times `scale` plus `offset`, rounded to f32.
    fn scale_strided(&self, start: usize, stride: usize, scale: f64, offset: f64, out: &mut [f32]);
}

impl<T: RawSample> Interleaved for [T] {
    const MAX_ABS: Option<f64> = T::MAX_ABS;
    fn count(&self) -> usize {
        self.len()
    }
    fn scale_strided(&self, start: usize, stride: usize, scale: f64, offset: f64, out: &mut [f32]) {
        let src = self[start..].iter().step_by(stride);
        for (o, x) in out.iter_mut().zip(src) {
            *o = (x.to_f64() * scale + offset) as f32;
        }
    }
}

/// Defines a view of little-endian wire bytes as samples of one format.
macro_rules! wire_format {
    ($(#[$doc:meta])* $name:ident, $width:literal, $max:expr, |$c:ident| $decode:expr) => {
        $(#[$doc])*
        #[derive(Debug, Clone, Copy)]
        pub struct $name<'a>(pub &'a [u8]);

        impl Interleaved for $name<'_> {
            const MAX_ABS: Option<f64> = $max;
            fn count(&self) -> usize {
                self.0.len() / $width
            }
            fn scale_strided(
                &self,
                start: usize,
                stride: usize,
                scale: f64,
                offset: f64,
                out: &mut [f32],
            ) {
                let src = self.0[start * $width..].chunks_exact($width).step_by(stride);
                for (o, $c) in out.iter_mut().zip(src) {
                    *o = ($decode * scale + offset) as f32;
                }
            }
        }
    };
}

wire_format!(
    /// i16 wire samples.
    WireI16, 2, Some(32768.0), |c| f64::from(i16::from_le_bytes([c[0], c[1]]))
);
wire_format!(
    /// i24 wire samples: the 3 bytes go to the top of an i32, and the
    /// arithmetic shift right sign-extends bit 23.
    WireI24, 3, Some(8_388_608.0), |c| f64::from(i32::from_le_bytes([0, c[0], c[1], c[2]]) >> 8)
);
wire_format!(
    /// i32 wire samples.
    WireI32, 4, Some(2_147_483_648.0), |c| f64::from(i32::from_le_bytes([c[0], c[1], c[2], c[3]]))
);
wire_format!(
    /// f32 wire samples.
    WireF32, 4, None, |c| f64::from(f32::from_le_bytes([c[0], c[1], c[2], c[3]]))
);
wire_format!(
    /// f64 wire samples.
    WireF64, 8, None, |c| f64::from_le_bytes([c[0], c[1], c[2], c[3], c[4], c[5], c[6], c[7]])
);

#[cfg(test)]
#[allow(clippy::unwrap_used)] // tests may unwrap: a panic is a failed test
mod tests {
    use super::*;
    use crate::frame::{encode_samples, SampleFormat, SampleSlice, Samples, I24_MAX, I24_MIN};

    /// Reads every channel of `src` with `scale_strided`.
    fn read_all<S: Interleaved + ?Sized>(
        src: &S,
        width: usize,
        scale: f64,
        offset: f64,
    ) -> Vec<Vec<u32>> {
        let instants = src.count() / width;
        (0..width)
            .map(|c| {
                let mut out = vec![0.0f32; instants];
                src.scale_strided(c, width, scale, offset, &mut out);
                out.iter().map(|x| x.to_bits()).collect()
            })
            .collect()
    }

    /// Each wire reader gives, bit for bit, what the typed slice decoded by
    /// `Samples::decode_from` gives: two's complement integers with the
    /// 24-bit edges (common practice), IEEE 754 floats little-endian with a
    /// NaN and an infinity carried through.
    #[test]
    fn wire_readers_match_the_decoded_slices() {
        let (width, scale, offset) = (3, 6e-6, -0.25);
        let i32s: Vec<i32> = vec![0, 1, -1, I24_MIN, I24_MAX, 12345, -54321, 7, -7];
        let i16s: Vec<i16> = vec![0, 1, -1, i16::MIN, i16::MAX, 300, -300, 2, -2];
        let wide: Vec<i32> = vec![0, 1, -1, i32::MIN, i32::MAX, 1 << 30, -(1 << 30), 5, -5];
        let f32s: Vec<f32> = vec![
            0.0,
            -0.0,
            1.5,
            f32::NAN,
            f32::INFINITY,
            -3.25e7,
            1e-30,
            2.0,
            -2.0,
        ];
        let f64s: Vec<f64> = vec![
            0.0,
            -0.0,
            1.5,
            f64::NAN,
            f64::NEG_INFINITY,
            -3.25e7,
            1e-300,
            2.0,
            -2.0,
        ];
        let cases: [(SampleFormat, SampleSlice<'_>); 5] = [
            (SampleFormat::I16, SampleSlice::I16(&i16s)),
            (SampleFormat::I24, SampleSlice::I32(&i32s)),
            (SampleFormat::I32, SampleSlice::I32(&wide)),
            (SampleFormat::F32, SampleSlice::F32(&f32s)),
            (SampleFormat::F64, SampleSlice::F64(&f64s)),
        ];
        for (format, slice) in cases {
            let mut bytes = Vec::new();
            encode_samples(format, slice, &mut bytes).unwrap();
            let mut decoded = Samples::default();
            decoded.decode_from(format, &bytes);
            let want = match &decoded {
                Samples::I16(v) => read_all(v.as_slice(), width, scale, offset),
                Samples::I32(v) => read_all(v.as_slice(), width, scale, offset),
                Samples::F32(v) => read_all(v.as_slice(), width, scale, offset),
                Samples::F64(v) => read_all(v.as_slice(), width, scale, offset),
            };
            let got = match format {
                SampleFormat::I16 => read_all(&WireI16(&bytes), width, scale, offset),
                SampleFormat::I24 => read_all(&WireI24(&bytes), width, scale, offset),
                SampleFormat::I32 => read_all(&WireI32(&bytes), width, scale, offset),
                SampleFormat::F32 => read_all(&WireF32(&bytes), width, scale, offset),
                SampleFormat::F64 => read_all(&WireF64(&bytes), width, scale, offset),
            };
            assert_eq!(got, want, "{}", format.as_str());
            assert_eq!(
                got.iter().map(Vec::len).sum::<usize>(),
                9,
                "{}",
                format.as_str()
            );
        }
    }

    /// The i24 reader's sign extension, checked against values written out
    /// by hand: 0x800000 is the minimum, 0x7FFFFF the maximum, 0xFFFFFF is
    /// -1 (two's complement, common practice).
    #[test]
    fn i24_reader_sign_extends() {
        let bytes = [0x00, 0x00, 0x80, 0xFF, 0xFF, 0x7F, 0xFF, 0xFF, 0xFF];
        let mut out = [0.0f32; 3];
        WireI24(&bytes).scale_strided(0, 1, 1.0, 0.0, &mut out);
        assert_eq!(out, [-8_388_608.0, 8_388_607.0, -1.0]);
        assert_eq!(WireI24(&bytes).count(), 3);
        assert_eq!(WireI24::MAX_ABS, Some(8_388_608.0));
    }
}
