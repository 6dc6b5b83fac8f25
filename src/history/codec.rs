//! How a stored spectrum's lines are packed into a BLOB: without loss.
//!
//! The published values are `f32` power per line. Neighbouring lines of a
//! spectrum share their sign and most of their exponent but hardly any of
//! their mantissa bits, so a general compressor on the plain little-endian
//! bytes finds little to take. The codec first transposes the bytes (all
//! first bytes of the values, then all second bytes, …: the "byte shuffle"
//! of scientific array formats, common practice), which puts the slowly
//! varying exponent bytes side by side, then deflates (RFC 1951, through
//! flate2: the crate is already in the build for gzip over HTTP). Decoding
//! gives back the exact bit patterns (NaN payloads and signed zeros too):
//! `decode(encode(x)) == x` bit for bit, tested below over random bit
//! patterns.
//!
//! Layout: one byte `1` (the codec's version), the line count as a
//! little-endian u32, then the deflate stream of the shuffled bytes.

use std::io::{Read, Write};

use flate2::read::DeflateDecoder;
use flate2::write::DeflateEncoder;
use flate2::Compression;

/// The codec version written in the first byte.
const VERSION: u8 = 1;
/// Bytes before the deflate stream.
const HEADER: usize = 5;
/// The most lines a stored spectrum may have (nfft up to 2^20 gives
/// 2^19 + 1 lines); a header asking for more is refused before anything
/// is allocated.
pub const MAX_LINES: usize = (1 << 20) + 1;

/// Why a BLOB is not a spectrum.
#[derive(Debug, thiserror::Error, PartialEq, Eq)]
pub enum CodecError {
    #[error("blob of {len} bytes is shorter than its {HEADER}-byte header")]
    Short { len: usize },
    #[error("byte 0: codec version {found}, expected {VERSION}")]
    Version { found: u8 },
    #[error("bytes 1..5: {lines} lines is more than {MAX_LINES}")]
    TooMany { lines: usize },
    #[error("byte {offset}: the deflate stream is damaged ({reason})")]
    Damaged { offset: usize, reason: String },
    #[error("the deflate stream holds {got} bytes, the header says {want}")]
    Length { got: usize, want: usize },
}

/// Packs `values` (see the module comment).
pub fn encode(values: &[f32]) -> Vec<u8> {
    let n = values.len();
    let mut shuffled = vec![0u8; 4 * n];
    for (i, v) in values.iter().enumerate() {
        let b = v.to_bits().to_le_bytes();
        for (k, byte) in b.iter().enumerate() {
            shuffled[k * n + i] = *byte;
        }
    }
    let mut out = Vec::with_capacity(HEADER + 4 * n / 2);
    out.push(VERSION);
    out.extend_from_slice(&(n as u32).to_le_bytes());
    let mut enc = DeflateEncoder::new(out, Compression::new(6));
    // Writing into a Vec cannot fail.
    let _ = enc.write_all(&shuffled);
    enc.finish().unwrap_or_default()
}

/// Unpacks a BLOB written by [`encode`].
///
/// # Errors
/// A short or damaged BLOB, an unknown version, a line count beyond
/// [`MAX_LINES`] or a stream whose length disagrees with the header.
pub fn decode(blob: &[u8]) -> Result<Vec<f32>, CodecError> {
    if blob.len() < HEADER {
        return Err(CodecError::Short { len: blob.len() });
    }
    if blob[0] != VERSION {
        return Err(CodecError::Version { found: blob[0] });
    }
    let n = u32::from_le_bytes([blob[1], blob[2], blob[3], blob[4]]) as usize;
    if n > MAX_LINES {
        return Err(CodecError::TooMany { lines: n });
    }
    let want = 4 * n;
    let mut shuffled = Vec::with_capacity(want);
    // One byte more than expected tells a stream that is too long.
    let mut dec = DeflateDecoder::new(&blob[HEADER..]).take(want as u64 + 1);
    dec.read_to_end(&mut shuffled)
        .map_err(|e| CodecError::Damaged {
            offset: HEADER,
            reason: e.to_string(),
        })?;
    if shuffled.len() != want {
        return Err(CodecError::Length {
            got: shuffled.len(),
            want,
        });
    }
    Ok((0..n)
        .map(|i| {
            f32::from_bits(u32::from_le_bytes([
                shuffled[i],
                shuffled[n + i],
                shuffled[2 * n + i],
                shuffled[3 * n + i],
            ]))
        })
        .collect())
}

#[cfg(test)]
mod tests {
    use super::*;
    use proptest::prelude::*;

    fn bits(v: &[f32]) -> Vec<u32> {
        v.iter().map(|x| x.to_bits()).collect()
    }

    proptest! {
        /// Any bit pattern comes back as it went in: NaNs with payloads,
        /// infinities, signed zeros, subnormals.
        #[test]
        fn round_trip_is_bit_exact(raw in proptest::collection::vec(any::<u32>(), 0..3000)) {
            let v: Vec<f32> = raw.iter().map(|b| f32::from_bits(*b)).collect();
            let back = decode(&encode(&v)).map_err(|e| TestCaseError::fail(e.to_string()))?;
            prop_assert_eq!(bits(&back), raw);
        }

        /// No input makes decode panic or allocate beyond the header's
        /// bound: every outcome is Ok or a typed error.
        #[test]
        fn decode_never_panics(blob in proptest::collection::vec(any::<u8>(), 0..200)) {
            let _ = decode(&blob);
        }
    }

    #[test]
    fn a_spectrum_shrinks() {
        // A power spectrum's shape: a 1/f floor with a few tones, values
        // spanning decades, as a real channel's.
        let v: Vec<f32> = (0..4097)
            .map(|i| {
                let f = i as f32 + 1.0;
                let tone = if i % 512 == 25 { 1e-2 } else { 0.0 };
                1e-6 / f + tone + 1e-9 * ((i * 7919 % 101) as f32)
            })
            .collect();
        let blob = encode(&v);
        assert!(blob.len() < 4 * v.len(), "{} bytes", blob.len());
        assert_eq!(bits(&decode(&blob).expect("decodes")), bits(&v));
    }

    #[test]
    fn errors_name_the_byte() {
        assert_eq!(decode(&[1, 0]), Err(CodecError::Short { len: 2 }));
        assert_eq!(
            decode(&[2, 0, 0, 0, 0]),
            Err(CodecError::Version { found: 2 })
        );
        let huge = [1, 0xff, 0xff, 0xff, 0xff];
        assert!(matches!(decode(&huge), Err(CodecError::TooMany { .. })));
        // A header promising more lines than the stream holds.
        let mut blob = encode(&[1.0, 2.0]);
        blob[1] = 3;
        assert_eq!(decode(&blob), Err(CodecError::Length { got: 8, want: 12 }));
        // A stream cut short.
        let blob = encode(&[1.0; 100]);
        let cut = &blob[..blob.len() - 3];
        assert!(decode(cut).is_err());
    }
}
