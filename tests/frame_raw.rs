//! The `raw` headerless framing through the public API.
#![allow(clippy::unwrap_used)] // tests may unwrap: a panic is a failed test

use bandwatch::frame::raw::{RawBatch, RawDecoder};
use bandwatch::frame::{encode_samples, SampleFormat, SampleSlice, Samples, I24_MAX, I24_MIN};
use proptest::prelude::*;

fn samples_strategy() -> impl Strategy<Value = (SampleFormat, usize, Samples)> {
    (1usize..=8, 1usize..50).prop_flat_map(|(c, n)| {
        let len = c * n;
        prop_oneof![
            proptest::collection::vec(any::<i16>(), len).prop_map(move |v| (
                SampleFormat::I16,
                c,
                Samples::I16(v)
            )),
            proptest::collection::vec(I24_MIN..=I24_MAX, len).prop_map(move |v| (
                SampleFormat::I24,
                c,
                Samples::I32(v)
            )),
            proptest::collection::vec(any::<i32>(), len).prop_map(move |v| (
                SampleFormat::I32,
                c,
                Samples::I32(v)
            )),
            proptest::collection::vec(-1e6f32..1e6, len).prop_map(move |v| (
                SampleFormat::F32,
                c,
                Samples::F32(v)
            )),
            proptest::collection::vec(-1e12f64..1e12, len).prop_map(move |v| (
                SampleFormat::F64,
                c,
                Samples::F64(v)
            )),
        ]
    })
}

proptest! {
    /// Encoded samples fed in random chunks come back equal, with the
    /// partial instant carried across feeds and indices counting up.
    #[test]
    fn raw_round_trip((format, c, samples) in samples_strategy(),
                      sizes in proptest::collection::vec(1usize..40, 1..6)) {
        let mut bytes = Vec::new();
        encode_samples(format, samples.as_slice(), &mut bytes).unwrap();
        let mut d = RawDecoder::new(format, c).unwrap();
        let mut out = Samples::default();
        let mut got = Samples::default();
        got.reset_for(format);
        let (mut at, mut k, mut next) = (0, 0, 0u64);
        while at < bytes.len() {
            let n = sizes[k % sizes.len()].min(bytes.len() - at);
            let b = d.feed(&bytes[at..at + n], &mut out);
            prop_assert_eq!(b.first_sample, next);
            next += b.instants as u64;
            prop_assert!(d.pending_bytes() < d.instant_bytes());
            match (&mut got, &out) {
                (Samples::I16(g), Samples::I16(o)) => g.extend_from_slice(o),
                (Samples::I32(g), Samples::I32(o)) => g.extend_from_slice(o),
                (Samples::F32(g), Samples::F32(o)) => g.extend_from_slice(o),
                (Samples::F64(g), Samples::F64(o)) => g.extend_from_slice(o),
                (g, o) => prop_assert!(false, "variant {:?} vs {:?}", g, o),
            }
            at += n;
            k += 1;
        }
        prop_assert_eq!(got, samples);
        prop_assert_eq!(d.pending_bytes(), 0);
        prop_assert_eq!(d.stats().bytes_in, bytes.len() as u64);
    }
}

#[test]
fn i24_little_endian_layout() {
    // 0x123456 and -2 (0xFFFFFE) as 3-byte little-endian two's complement
    // (common practice).
    let mut d = RawDecoder::new(SampleFormat::I24, 2).unwrap();
    let mut out = Samples::default();
    let b = d.feed(&[0x56, 0x34, 0x12, 0xFE, 0xFF, 0xFF], &mut out);
    assert_eq!(
        b,
        RawBatch {
            first_sample: 0,
            instants: 1
        }
    );
    assert_eq!(out, Samples::I32(vec![0x12_3456, -2]));
}

#[test]
fn reset_drops_the_partial_instant() {
    let mut d = RawDecoder::new(SampleFormat::F32, 2).unwrap();
    let mut out = Samples::default();
    let mut bytes = Vec::new();
    encode_samples(
        SampleFormat::F32,
        SampleSlice::F32(&[1.0, 2.0, 3.0, 4.0]),
        &mut bytes,
    )
    .unwrap();
    d.feed(&bytes[..11], &mut out);
    assert_eq!(out, Samples::F32(vec![1.0, 2.0]));
    assert_eq!(d.reset(), 3);
    assert_eq!(d.stats().bytes_dropped, 3);
    // After the reset the stream starts on an instant boundary again.
    let b = d.feed(&bytes[8..], &mut out);
    assert_eq!(
        b,
        RawBatch {
            first_sample: 1,
            instants: 1
        }
    );
    assert_eq!(out, Samples::F32(vec![3.0, 4.0]));
}
