//! Shared helpers for the `frame_*` tests: a deterministic sample generator
//! for the P2 demo channels, an independent bitwise CRC-32, byte patching.
#![allow(dead_code, unused_imports, clippy::unwrap_used)] // each test file uses a subset; tests may unwrap

use bandwatch::frame::bwf1::{self, Header};
use bandwatch::frame::{SampleFormat, SampleSlice, I24_MAX, I24_MIN};

/// CRC-32/IEEE computed bit by bit from the algorithm's parameters
/// (common practice), independent of crc32fast; shared with `selftest`.
pub use bandwatch::tools::selftest::crc32_bitwise;

/// Rewrites a frame's trailing CRC after its bytes were patched, so that a
/// test reaches the header check it means to reach.
pub fn refresh_crc(frame: &mut [u8]) {
    let n = frame.len() - 4;
    let crc = crc32fast::hash(&frame[..n]);
    frame[n..].copy_from_slice(&crc.to_le_bytes());
}

/// Small deterministic generator (64-bit LCG, Knuth's MMIX constants;
/// from memory, any full-period LCG would do here).
pub struct Lcg(pub u64);

impl Lcg {
    pub fn next_u32(&mut self) -> u32 {
        self.0 = self
            .0
            .wrapping_mul(6364136223846793005)
            .wrapping_add(1442695040888963407);
        (self.0 >> 32) as u32
    }
}

/// Channels of the demo pump train, in source order.
pub const P2_CHANNELS: [&str; 3] = ["motor-de", "pump-de", "pump-nde"];
pub const P2_RATE_HZ: f64 = 25_600.0;

/// Interleaved 24-bit counts for `instants` instants of the three P2
/// channels, integer arithmetic only (no libm, so the bytes are the same on
/// every machine): a triangle wave per channel plus noise, spanning about 90 %
/// of the 24-bit range so sign handling is exercised.
pub fn p2_counts(first: u64, instants: usize) -> Vec<i32> {
    let mut rng = Lcg(0x5032 ^ first);
    let mut out = Vec::with_capacity(instants * 3);
    for i in 0..instants as u64 {
        let t = first + i;
        for (c, period) in [1034u64, 148, 287].into_iter().enumerate() {
            let phase = (t % period) as i64;
            let half = period as i64 / 2;
            let tri = (if phase < half {
                phase
            } else {
                period as i64 - phase
            }) * 4
                - period as i64;
            let amp = (I24_MAX as i64 * 9 / 10) / (period as i64);
            let noise = i64::from(rng.next_u32() % 20_001) - 10_000;
            let v = (tri * amp + noise + c as i64 * 1000).clamp(I24_MIN as i64, I24_MAX as i64);
            out.push(v as i32);
        }
    }
    out
}

/// A stream of `frames` BWF1 frames of `per_frame` instants of P2 counts,
/// in i24, consecutive first_sample. Returns the bytes and the frames'
/// (header, samples).
pub fn p2_stream(frames: usize, per_frame: u32) -> (Vec<u8>, Vec<(Header, Vec<i32>)>) {
    let mut bytes = Vec::new();
    let mut parts = Vec::new();
    for k in 0..frames as u64 {
        let first = k * u64::from(per_frame);
        let h = Header::new(
            SampleFormat::I24,
            3,
            per_frame,
            first,
            1_780_000_000_000_000_000 + first * 39_063,
            P2_RATE_HZ,
        );
        let counts = p2_counts(first, per_frame as usize);
        bwf1::encode_into(&h, SampleSlice::I32(&counts), &mut bytes).unwrap();
        parts.push((h, counts));
    }
    (bytes, parts)
}

/// Whether `bytes` contains the BWF1 magic anywhere.
pub fn contains_magic(bytes: &[u8]) -> bool {
    bytes.windows(4).any(|w| w == bwf1::MAGIC)
}
