//! Framing: turns the bytes a transport delivers into interleaved samples.
//!
//! Pure code, no I/O: a reader (TCP, UDP, serial, replay file) hands bytes to
//! one of the decoders here and writes what comes out into the rings.
//!
//! - [`bwf1`]: the binary BWF1 frame (header, samples, CRC-32). A
//!   [`bwf1::StreamDecoder`] for byte streams (TCP, serial) that resyncs on
//!   the next magic after a bad frame, and [`bwf1::decode_datagram`] for UDP
//!   where one datagram is one frame.
//! - [`lines`]: text, one instant per line.
//! - [`raw`]: headerless interleaved samples of a configured format.
//! - [`wire`]: readers of interleaved samples, typed or still in wire
//!   bytes, one channel's stretch at a time, scaled to f32.
//!
//! Every decoder works as *check, then parse*: "not enough bytes yet" is
//! `Ok(None)` (or an empty batch), never an error. Bad input is returned as
//! a typed error naming the byte offset or line and the field that was wrong,
//! and is counted in the decoder's stats; the decoder then carries on with
//! the input that follows.

pub mod bwf1;
pub mod lines;
pub mod raw;
pub mod wire;

/// How one sample is stored on the wire. Integer formats carry converter
/// counts, float formats carry values (volts or units, as the config says).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum SampleFormat {
    /// 2 bytes, little-endian two's complement.
    I16,
    /// 3 bytes, little-endian two's complement (24-bit converters).
    I24,
    /// 4 bytes, little-endian two's complement.
    I32,
    /// 4 bytes, IEEE 754 binary32, little-endian.
    F32,
    /// 8 bytes, IEEE 754 binary64, little-endian.
    F64,
}

impl SampleFormat {
    /// Every format, in wire-code order.
    pub const ALL: [SampleFormat; 5] = [
        SampleFormat::I16,
        SampleFormat::I32,
        SampleFormat::F32,
        SampleFormat::F64,
        SampleFormat::I24,
    ];

    /// Bytes per sample on the wire.
    pub const fn width(self) -> usize {
        match self {
            SampleFormat::I16 => 2,
            SampleFormat::I24 => 3,
            SampleFormat::I32 | SampleFormat::F32 => 4,
            SampleFormat::F64 => 8,
        }
    }

    /// The BWF1 header code (byte 5).
    pub const fn code(self) -> u8 {
        match self {
            SampleFormat::I16 => 1,
            SampleFormat::I32 => 2,
            SampleFormat::F32 => 3,
            SampleFormat::F64 => 4,
            SampleFormat::I24 => 5,
        }
    }

    /// The format for a BWF1 header code, if the code is known.
    pub const fn from_code(code: u8) -> Option<SampleFormat> {
        match code {
            1 => Some(SampleFormat::I16),
            2 => Some(SampleFormat::I32),
            3 => Some(SampleFormat::F32),
            4 => Some(SampleFormat::F64),
            5 => Some(SampleFormat::I24),
            _ => None,
        }
    }

    /// The name used in config files and logs.
    pub const fn as_str(self) -> &'static str {
        match self {
            SampleFormat::I16 => "i16",
            SampleFormat::I24 => "i24",
            SampleFormat::I32 => "i32",
            SampleFormat::F32 => "f32",
            SampleFormat::F64 => "f64",
        }
    }
}

/// Smallest value a 24-bit two's complement sample holds.
pub const I24_MIN: i32 = -(1 << 23);
/// Largest value a 24-bit two's complement sample holds.
pub const I24_MAX: i32 = (1 << 23) - 1;

/// Decoded samples, interleaved by instant, in their wire type. `I32` also
/// holds `i24` samples, sign-extended. Reuse one value across frames: the
/// decoders clear and refill the vector in place when the variant matches,
/// so a steady stream decodes without allocating.
#[derive(Debug, Clone, PartialEq)]
pub enum Samples {
    I16(Vec<i16>),
    I32(Vec<i32>),
    F32(Vec<f32>),
    F64(Vec<f64>),
}

impl Default for Samples {
    fn default() -> Self {
        Samples::F64(Vec::new())
    }
}

/// A borrowed view of samples, for encoding without copying.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum SampleSlice<'a> {
    I16(&'a [i16]),
    I32(&'a [i32]),
    F32(&'a [f32]),
    F64(&'a [f64]),
}

impl SampleSlice<'_> {
    /// Number of samples (all channels).
    pub fn len(&self) -> usize {
        match self {
            SampleSlice::I16(v) => v.len(),
            SampleSlice::I32(v) => v.len(),
            SampleSlice::F32(v) => v.len(),
            SampleSlice::F64(v) => v.len(),
        }
    }

    pub fn is_empty(&self) -> bool {
        self.len() == 0
    }
}

impl Samples {
    /// Number of samples (all channels).
    pub fn len(&self) -> usize {
        self.as_slice().len()
    }

    pub fn is_empty(&self) -> bool {
        self.len() == 0
    }

    /// A borrowed view, e.g. to re-encode.
    pub fn as_slice(&self) -> SampleSlice<'_> {
        match self {
            Samples::I16(v) => SampleSlice::I16(v),
            Samples::I32(v) => SampleSlice::I32(v),
            Samples::F32(v) => SampleSlice::F32(v),
            Samples::F64(v) => SampleSlice::F64(v),
        }
    }

    /// Sample `i` as f64 (for tests and slow paths; hot paths match on the
    /// variant and hand the typed slice on).
    pub fn get_f64(&self, i: usize) -> Option<f64> {
        match self {
            Samples::I16(v) => v.get(i).map(|&x| f64::from(x)),
            Samples::I32(v) => v.get(i).map(|&x| f64::from(x)),
            Samples::F32(v) => v.get(i).map(|&x| f64::from(x)),
            Samples::F64(v) => v.get(i).copied(),
        }
    }

    /// Replaces the contents with the samples in `bytes`, read as `format`.
    /// A trailing partial sample (when `bytes.len()` is not a multiple of
    /// the width) is ignored; callers pass whole samples.
    pub fn decode_from(&mut self, format: SampleFormat, bytes: &[u8]) {
        self.reset_for(format);
        self.extend_decoded(format, bytes);
    }

    /// Empties the buffer and makes its variant the one `format` decodes
    /// into, keeping the allocation when the variant already matches (a
    /// steady stream keeps one variant).
    pub fn reset_for(&mut self, format: SampleFormat) {
        match (format, &mut *self) {
            (SampleFormat::I16, Samples::I16(v)) => v.clear(),
            (SampleFormat::I24 | SampleFormat::I32, Samples::I32(v)) => v.clear(),
            (SampleFormat::F32, Samples::F32(v)) => v.clear(),
            (SampleFormat::F64, Samples::F64(v)) => v.clear(),
            (SampleFormat::I16, _) => *self = Samples::I16(Vec::new()),
            (SampleFormat::I24 | SampleFormat::I32, _) => *self = Samples::I32(Vec::new()),
            (SampleFormat::F32, _) => *self = Samples::F32(Vec::new()),
            (SampleFormat::F64, _) => *self = Samples::F64(Vec::new()),
        }
    }

    /// Appends the whole samples in `bytes`, read as `format`. If the
    /// variant does not match `format`, the contents are dropped first.
    /// Slices, not per-sample branching: one `chunks_exact` pass per call.
    pub fn extend_decoded(&mut self, format: SampleFormat, bytes: &[u8]) {
        match (format, &mut *self) {
            (SampleFormat::I16, Samples::I16(v)) => v.extend(
                bytes
                    .chunks_exact(2)
                    .map(|c| i16::from_le_bytes([c[0], c[1]])),
            ),
            // Place the 3 bytes in the top of an i32, then shift right
            // arithmetically: that sign-extends bit 23.
            (SampleFormat::I24, Samples::I32(v)) => v.extend(
                bytes
                    .chunks_exact(3)
                    .map(|c| i32::from_le_bytes([0, c[0], c[1], c[2]]) >> 8),
            ),
            (SampleFormat::I32, Samples::I32(v)) => v.extend(
                bytes
                    .chunks_exact(4)
                    .map(|c| i32::from_le_bytes([c[0], c[1], c[2], c[3]])),
            ),
            (SampleFormat::F32, Samples::F32(v)) => v.extend(
                bytes
                    .chunks_exact(4)
                    .map(|c| f32::from_le_bytes([c[0], c[1], c[2], c[3]])),
            ),
            (SampleFormat::F64, Samples::F64(v)) => v.extend(
                bytes
                    .chunks_exact(8)
                    .map(|c| f64::from_le_bytes([c[0], c[1], c[2], c[3], c[4], c[5], c[6], c[7]])),
            ),
            _ => {
                self.reset_for(format);
                self.extend_decoded(format, bytes);
            }
        }
    }
}

/// Why [`encode_samples`] (and the BWF1 encoder) refused its input.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum EncodeError {
    #[error("samples are {given} but the format is {format}")]
    TypeMismatch {
        format: &'static str,
        given: &'static str,
    },
    #[error("sample {index} = {value} does not fit in 24 bits")]
    I24OutOfRange { index: usize, value: i32 },
    #[error("{given} samples given, header announces {expected} (channels x samples_per_channel)")]
    CountMismatch { expected: u64, given: usize },
    #[error("header is invalid: {0}")]
    Header(#[source] bwf1::FrameError),
}

/// Appends `samples` to `out` in `format`'s wire layout. `I16` slices encode
/// as i16, `I32` as i32 or i24 (range-checked), `F32` as f32, `F64` as f64.
///
/// # Errors
/// [`EncodeError::TypeMismatch`] when the slice type does not match the
/// format, [`EncodeError::I24OutOfRange`] for an i24 value outside
/// [`I24_MIN`]..=[`I24_MAX`]. On error `out` is left as it was.
pub fn encode_samples(
    format: SampleFormat,
    samples: SampleSlice<'_>,
    out: &mut Vec<u8>,
) -> Result<(), EncodeError> {
    let mismatch = |given: &'static str| EncodeError::TypeMismatch {
        format: format.as_str(),
        given,
    };
    match (format, samples) {
        (SampleFormat::I16, SampleSlice::I16(v)) => {
            out.reserve(v.len() * 2);
            for x in v {
                out.extend_from_slice(&x.to_le_bytes());
            }
        }
        (SampleFormat::I32, SampleSlice::I32(v)) => {
            out.reserve(v.len() * 4);
            for x in v {
                out.extend_from_slice(&x.to_le_bytes());
            }
        }
        (SampleFormat::I24, SampleSlice::I32(v)) => {
            if let Some((index, &value)) = v
                .iter()
                .enumerate()
                .find(|(_, &x)| !(I24_MIN..=I24_MAX).contains(&x))
            {
                return Err(EncodeError::I24OutOfRange { index, value });
            }
            out.reserve(v.len() * 3);
            for x in v {
                let b = x.to_le_bytes();
                out.extend_from_slice(&b[..3]);
            }
        }
        (SampleFormat::F32, SampleSlice::F32(v)) => {
            out.reserve(v.len() * 4);
            for x in v {
                out.extend_from_slice(&x.to_le_bytes());
            }
        }
        (SampleFormat::F64, SampleSlice::F64(v)) => {
            out.reserve(v.len() * 8);
            for x in v {
                out.extend_from_slice(&x.to_le_bytes());
            }
        }
        (_, SampleSlice::I16(_)) => return Err(mismatch("i16")),
        (_, SampleSlice::I32(_)) => return Err(mismatch("i32")),
        (_, SampleSlice::F32(_)) => return Err(mismatch("f32")),
        (_, SampleSlice::F64(_)) => return Err(mismatch("f64")),
    }
    Ok(())
}

#[cfg(test)]
#[allow(clippy::unwrap_used)] // tests may unwrap: a panic is a failed test
mod tests {
    use super::*;

    #[test]
    fn codes_round_trip_and_unknown_codes_are_rejected() {
        for f in SampleFormat::ALL {
            assert_eq!(SampleFormat::from_code(f.code()), Some(f));
        }
        assert_eq!(SampleFormat::from_code(0), None);
        assert_eq!(SampleFormat::from_code(6), None);
    }

    #[test]
    fn i24_sign_extension_at_the_edges() {
        // Two's complement 24-bit: 0x800000 is the minimum, 0x7FFFFF the
        // maximum, 0xFFFFFF is -1 (common practice).
        let bytes = [0x00, 0x00, 0x80, 0xFF, 0xFF, 0x7F, 0xFF, 0xFF, 0xFF];
        let mut s = Samples::default();
        s.decode_from(SampleFormat::I24, &bytes);
        assert_eq!(s, Samples::I32(vec![I24_MIN, I24_MAX, -1]));
    }

    #[test]
    fn i24_out_of_range_is_refused_and_output_untouched() {
        let mut out = vec![7u8];
        let err = encode_samples(SampleFormat::I24, SampleSlice::I32(&[0, 1 << 23]), &mut out);
        assert_eq!(
            err,
            Err(EncodeError::I24OutOfRange {
                index: 1,
                value: 1 << 23
            })
        );
        assert_eq!(out, vec![7u8]);
    }

    #[test]
    fn type_mismatch_is_refused() {
        let mut out = Vec::new();
        let err = encode_samples(SampleFormat::F32, SampleSlice::I16(&[1]), &mut out);
        assert!(matches!(err, Err(EncodeError::TypeMismatch { .. })));
    }

    #[test]
    fn decode_reuses_the_buffer() {
        let mut s = Samples::I16(Vec::with_capacity(64));
        s.decode_from(SampleFormat::I16, &[1, 0, 2, 0]);
        let Samples::I16(v) = &s else { panic!() };
        assert_eq!(v, &[1, 2]);
        assert!(v.capacity() >= 64);
    }
}
