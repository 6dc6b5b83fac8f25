//! BWF1 encoder and decoders, end to end through the public API.
#![allow(clippy::unwrap_used)] // tests may unwrap: a panic is a failed test

mod frame_common;

use bandwatch::frame::bwf1::{
    self, decode_datagram, encode, DatagramDecoder, FrameError, Header, RejectReason,
    StreamDecoder, HEADER_BYTES,
};
use bandwatch::frame::{EncodeError, SampleFormat, SampleSlice, Samples, I24_MAX, I24_MIN};
use frame_common::{contains_magic, crc32_bitwise, p2_stream, refresh_crc};
use proptest::prelude::*;

/// Drains every frame and error the decoder has.
fn drain(d: &mut StreamDecoder) -> (Vec<bwf1::Frame>, Vec<FrameError>) {
    let mut frames = Vec::new();
    let mut errors = Vec::new();
    loop {
        match d.next_frame() {
            Ok(Some(f)) => frames.push(f),
            Ok(None) => return (frames, errors),
            Err(e) => errors.push(e),
        }
    }
}

/// Pushes `bytes` in the given chunk sizes (cycled), draining after each.
fn decode_chunked(
    bytes: &[u8],
    sizes: &[usize],
) -> (Vec<bwf1::Frame>, Vec<FrameError>, StreamDecoder) {
    let mut d = StreamDecoder::new();
    let (mut frames, mut errors) = (Vec::new(), Vec::new());
    let mut at = 0;
    let mut k = 0;
    while at < bytes.len() {
        let n = sizes[k % sizes.len()].max(1).min(bytes.len() - at);
        d.push(&bytes[at..at + n]);
        at += n;
        k += 1;
        let (f, e) = drain(&mut d);
        frames.extend(f);
        errors.extend(e);
    }
    (frames, errors, d)
}

fn i32_samples(f: &bwf1::Frame) -> &[i32] {
    match &f.samples {
        Samples::I32(v) => v,
        other => panic!("expected i32 samples, got {other:?}"),
    }
}

fn small_frame(first: u64) -> Vec<u8> {
    let h = Header::new(SampleFormat::I16, 2, 3, first, 0, 1000.0);
    encode(&h, SampleSlice::I16(&[1, -1, 2, -2, 3, -3])).unwrap()
}

#[test]
fn crc32_check_value() {
    // CRC-32/IEEE ("CRC-32/ISO-HDLC") check value over ASCII "123456789":
    // 0xCBF43926, from the catalogue of parametrised CRC algorithms.
    assert_eq!(crc32fast::hash(b"123456789"), 0xCBF4_3926);
    assert_eq!(crc32_bitwise(b"123456789"), 0xCBF4_3926);
}

#[test]
fn frame_trailer_is_crc32_ieee_over_every_preceding_byte() {
    // The independent bitwise CRC (checked against the catalogue value
    // above) must equal each frame's trailer, for every format.
    for format in SampleFormat::ALL {
        let h = Header::new(format, 2, 2, 7, 9, 512.0);
        let f = match format {
            SampleFormat::I16 => encode(&h, SampleSlice::I16(&[1, 2, 3, 4])),
            SampleFormat::I24 | SampleFormat::I32 => encode(&h, SampleSlice::I32(&[1, -2, 3, -4])),
            SampleFormat::F32 => encode(&h, SampleSlice::F32(&[1.0, -2.0, 0.5, 4.0])),
            SampleFormat::F64 => encode(&h, SampleSlice::F64(&[1.0, -2.0, 0.5, 4.0])),
        }
        .unwrap();
        let n = f.len() - 4;
        assert_eq!(n, HEADER_BYTES + 4 * format.width());
        assert_eq!(f[n..], crc32_bitwise(&f[..n]).to_le_bytes(), "{format:?}");
    }
}

fn header_strategy(format: SampleFormat) -> impl Strategy<Value = Header> {
    (
        1u16..=6,
        1u32..=40,
        any::<u64>(),
        any::<u64>(),
        1e-3f64..1e7,
    )
        .prop_map(move |(c, s, first, ts, rate)| Header::new(format, c, s, first, ts, rate))
}

/// Encodes, then decodes with the stream decoder and as a datagram; both
/// must give back the header and exactly the sample bits.
fn round_trip(h: &Header, samples: SampleSlice<'_>) -> Result<(), TestCaseError> {
    let bytes = encode(h, samples).unwrap();
    prop_assert_eq!(bytes.len() as u64, h.frame_bytes());
    let mut d = StreamDecoder::new();
    d.push(&bytes);
    let f = d.next_frame().unwrap().unwrap();
    prop_assert_eq!(d.next_frame(), Ok(None));
    let g = decode_datagram(&bytes).unwrap();
    prop_assert_eq!(&f.header, h);
    prop_assert_eq!(&g.header, h);
    // Re-encoding compares bits (NaN payloads included) for float formats.
    prop_assert_eq!(encode(h, f.samples.as_slice()).unwrap(), bytes.clone());
    prop_assert_eq!(encode(h, g.samples.as_slice()).unwrap(), bytes);
    match (samples, &f.samples) {
        (SampleSlice::I16(a), Samples::I16(b)) => prop_assert_eq!(a, &b[..]),
        (SampleSlice::I32(a), Samples::I32(b)) => prop_assert_eq!(a, &b[..]),
        (SampleSlice::F32(a), Samples::F32(b)) => {
            prop_assert!(a.iter().zip(b).all(|(x, y)| x.to_bits() == y.to_bits()))
        }
        (SampleSlice::F64(a), Samples::F64(b)) => {
            prop_assert!(a.iter().zip(b).all(|(x, y)| x.to_bits() == y.to_bits()))
        }
        (a, b) => prop_assert!(false, "variant changed: {a:?} -> {b:?}"),
    }
    Ok(())
}

fn values<T: std::fmt::Debug>(
    h: &Header,
    s: impl Strategy<Value = T>,
) -> impl Strategy<Value = Vec<T>> {
    proptest::collection::vec(s, h.sample_count() as usize)
}

proptest! {
    #[test]
    fn round_trip_i16((h, v) in header_strategy(SampleFormat::I16)
        .prop_flat_map(|h| (Just(h), values(&h, any::<i16>())))) {
        round_trip(&h, SampleSlice::I16(&v))?;
    }

    #[test]
    fn round_trip_i32((h, v) in header_strategy(SampleFormat::I32)
        .prop_flat_map(|h| (Just(h), values(&h, any::<i32>())))) {
        round_trip(&h, SampleSlice::I32(&v))?;
    }

    #[test]
    fn round_trip_i24((h, v) in header_strategy(SampleFormat::I24)
        .prop_flat_map(|h| (Just(h), values(&h, prop_oneof![
            Just(I24_MIN), Just(I24_MAX), Just(-1), Just(0), I24_MIN..=I24_MAX
        ])))) {
        round_trip(&h, SampleSlice::I32(&v))?;
    }

    #[test]
    fn round_trip_f32((h, v) in header_strategy(SampleFormat::F32)
        .prop_flat_map(|h| (Just(h), values(&h, any::<u32>().prop_map(f32::from_bits))))) {
        round_trip(&h, SampleSlice::F32(&v))?;
    }

    #[test]
    fn round_trip_f64((h, v) in header_strategy(SampleFormat::F64)
        .prop_flat_map(|h| (Just(h), values(&h, any::<u64>().prop_map(f64::from_bits))))) {
        round_trip(&h, SampleSlice::F64(&v))?;
    }

    #[test]
    fn random_chunks_give_the_same_frames(sizes in proptest::collection::vec(1usize..200, 1..20)) {
        let (bytes, parts) = p2_stream(12, 37);
        let (frames, errors, d) = decode_chunked(&bytes, &sizes);
        prop_assert!(errors.is_empty());
        prop_assert_eq!(frames.len(), parts.len());
        for (f, (h, counts)) in frames.iter().zip(&parts) {
            prop_assert_eq!(&f.header, h);
            prop_assert_eq!(i32_samples(f), &counts[..]);
        }
        prop_assert_eq!(d.stats().frame_bytes, bytes.len() as u64);
        prop_assert_eq!(d.buffered(), 0);
    }

    #[test]
    fn body_corruption_in_the_middle_frame_is_skipped(at in 0usize..(37 * 3 * 3), xor in 1u8..=255) {
        let (mut bytes, parts) = p2_stream(5, 37);
        let len = parts[0].0.frame_bytes() as usize;
        bytes[2 * len + HEADER_BYTES + at] ^= xor;
        // A magic inside the bad frame would be a second (legitimate)
        // resync candidate; the generator's data makes that rare.
        prop_assume!(!contains_magic(&bytes[2 * len + 1..3 * len]));
        let mut d = StreamDecoder::new();
        d.push(&bytes);
        let (frames, errors) = drain(&mut d);
        prop_assert_eq!(errors.len(), 1);
        let is_crc_at_frame_2 = matches!(
            errors[0],
            FrameError::CrcMismatch { offset, .. } if offset == 2 * len as u64
        );
        prop_assert!(is_crc_at_frame_2, "{:?}", errors[0]);
        let firsts: Vec<u64> = frames.iter().map(|f| f.header.first_sample).collect();
        prop_assert_eq!(firsts, vec![0, 37, 111, 148]);
        let s = d.stats();
        prop_assert_eq!((s.frames, s.crc_errors, s.resyncs, s.rejected_total()), (4, 1, 1, 1));
        prop_assert_eq!(s.bytes_skipped, len as u64);
    }

    /// Junk runs (built from bytes of the magic, so partial magics abound,
    /// but never the whole magic) between good frames: every frame comes
    /// through, each junk run costs exactly one error and one resync, and
    /// every byte is accounted for.
    #[test]
    fn junk_between_frames(
        junk in proptest::collection::vec(
            proptest::collection::vec(prop_oneof![Just(b'B'), Just(b'W'), Just(b'F'), Just(b'1'), any::<u8>()], 0..12)
                .prop_filter("no whole magic", |j| !contains_magic(j)),
            6),
        sizes in proptest::collection::vec(1usize..64, 1..8),
    ) {
        let mut bytes = Vec::new();
        let mut good = Vec::new();
        for (k, j) in junk.iter().enumerate() {
            bytes.extend_from_slice(j);
            if k < 5 {
                bytes.extend_from_slice(&small_frame(k as u64 * 3));
                good.push(k as u64 * 3);
            }
        }
        let (frames, mut errors, mut d) = decode_chunked(&bytes, &sizes);
        if let Err(e) = d.finish() {
            errors.push(e);
        }
        let firsts: Vec<u64> = frames.iter().map(|f| f.header.first_sample).collect();
        prop_assert_eq!(firsts, good);
        let runs = junk.iter().filter(|j| !j.is_empty()).count() as u64;
        let runs_before_frames = junk[..5].iter().filter(|j| !j.is_empty()).count() as u64;
        prop_assert_eq!(errors.len() as u64, runs, "{:?}", errors);
        let s = d.stats();
        prop_assert_eq!(s.resyncs, runs_before_frames);
        let junk_bytes: usize = junk.iter().map(Vec::len).sum();
        prop_assert_eq!(s.bytes_skipped, junk_bytes as u64);
        prop_assert_eq!(s.bytes_in, s.frame_bytes + s.bytes_skipped);
    }
}

#[test]
fn one_byte_at_a_time() {
    let (bytes, parts) = p2_stream(8, 64);
    let (frames, errors, d) = decode_chunked(&bytes, &[1]);
    assert!(errors.is_empty());
    let whole: Vec<_> = parts.iter().map(|(h, _)| *h).collect();
    let got: Vec<_> = frames.iter().map(|f| f.header).collect();
    assert_eq!(got, whole);
    for (f, (_, counts)) in frames.iter().zip(&parts) {
        assert_eq!(i32_samples(f), &counts[..]);
    }
    assert_eq!(d.stats().frames, 8);
    // A frame is about 0.6 KiB here; fed a byte at a time the buffer must
    // stay near one frame, not grow with the stream.
    assert!(
        d.buffer_capacity() <= 4 * parts[0].0.frame_bytes() as usize,
        "{}",
        d.buffer_capacity()
    );
}

#[test]
fn i24_every_value_round_trips() {
    // All 2^24 values, in one frame of 256 channels x 65536 instants.
    let all: Vec<i32> = (I24_MIN..=I24_MAX).collect();
    assert_eq!(all.len(), 1 << 24);
    let h = Header::new(SampleFormat::I24, 256, 65536, 0, 0, 1.0);
    let bytes = encode(&h, SampleSlice::I32(&all)).unwrap();
    assert_eq!(&bytes[HEADER_BYTES..HEADER_BYTES + 3], &[0x00, 0x00, 0x80]);
    let f = decode_datagram(&bytes).unwrap();
    assert!(f.samples == Samples::I32(all));
}

#[test]
fn corrupted_magic_of_the_middle_frame() {
    let (mut bytes, parts) = p2_stream(3, 10);
    let len = parts[0].0.frame_bytes() as usize;
    bytes[len + 1] = b'X';
    let mut d = StreamDecoder::new();
    d.push(&bytes);
    let (frames, errors) = drain(&mut d);
    assert_eq!(errors, vec![FrameError::BadMagic { offset: len as u64 }]);
    assert_eq!(frames.len(), 2);
    assert_eq!(frames[1].header.first_sample, 20);
    let s = d.stats();
    assert_eq!(
        (
            s.resyncs,
            s.bytes_skipped,
            s.rejected(RejectReason::BadMagic)
        ),
        (1, len as u64, 1)
    );
}

#[test]
fn header_errors_name_the_field_offset() {
    // A good frame first, so that offsets are stream offsets, not 0.
    let good = small_frame(0);
    let k = good.len() as u64;
    type Patch = fn(&mut [u8]);
    let cases: Vec<(Patch, FrameError)> = vec![
        (
            |f| f[4] = 2,
            FrameError::UnsupportedVersion {
                offset: k + 4,
                version: 2,
            },
        ),
        (
            |f| f[5] = 0,
            FrameError::BadFormat {
                offset: k + 5,
                code: 0,
            },
        ),
        (
            |f| f[5] = 6,
            FrameError::BadFormat {
                offset: k + 5,
                code: 6,
            },
        ),
        (
            |f| f[6..8].copy_from_slice(&0u16.to_le_bytes()),
            FrameError::BadChannelCount {
                offset: k + 6,
                count: 0,
            },
        ),
        (
            |f| f[6..8].copy_from_slice(&1025u16.to_le_bytes()),
            FrameError::BadChannelCount {
                offset: k + 6,
                count: 1025,
            },
        ),
        (
            |f| f[8..12].copy_from_slice(&0u32.to_le_bytes()),
            FrameError::BadSampleCount {
                offset: k + 8,
                count: 0,
            },
        ),
        (
            |f| f[8..12].copy_from_slice(&65537u32.to_le_bytes()),
            FrameError::BadSampleCount {
                offset: k + 8,
                count: 65537,
            },
        ),
        (
            |f| f[28..36].copy_from_slice(&0f64.to_le_bytes()),
            FrameError::BadSampleRate {
                offset: k + 28,
                rate: 0.0,
            },
        ),
        (
            |f| f[28..36].copy_from_slice(&(-1f64).to_le_bytes()),
            FrameError::BadSampleRate {
                offset: k + 28,
                rate: -1.0,
            },
        ),
        (
            |f| f[28..36].copy_from_slice(&f64::INFINITY.to_le_bytes()),
            FrameError::BadSampleRate {
                offset: k + 28,
                rate: f64::INFINITY,
            },
        ),
    ];
    for (patch, want) in cases {
        let mut bad = small_frame(3);
        patch(&mut bad);
        refresh_crc(&mut bad);
        let mut bytes = good.clone();
        bytes.extend_from_slice(&bad);
        bytes.extend_from_slice(&small_frame(6));
        let mut d = StreamDecoder::new();
        d.push(&bytes);
        let (frames, errors) = drain(&mut d);
        assert_eq!(errors, vec![want.clone()]);
        assert_eq!(errors[0].reason(), want.reason());
        let firsts: Vec<u64> = frames.iter().map(|f| f.header.first_sample).collect();
        assert_eq!(firsts, vec![0, 6], "{want}");
        assert_eq!(d.stats().bytes_skipped, bad.len() as u64);

        // The same frame alone as a datagram: same error, offset from 0.
        let e = decode_datagram(&bad).unwrap_err();
        assert_eq!(e.offset(), want.offset() - k);
        assert_eq!(e.reason(), want.reason());
    }
    // NaN compares unequal to itself, so check that case by shape.
    let mut bad = small_frame(3);
    bad[28..36].copy_from_slice(&f64::NAN.to_le_bytes());
    refresh_crc(&mut bad);
    assert!(
        matches!(decode_datagram(&bad), Err(FrameError::BadSampleRate { offset: 28, rate }) if rate.is_nan())
    );
}

#[test]
fn huge_announced_frame_is_refused_without_allocation() {
    // 1024 channels x 65536 instants of f64: 512 MiB + 40 bytes announced.
    let h = Header::new(SampleFormat::F64, 1024, 65536, 0, 0, 25_600.0);
    let mut header = Vec::new();
    h.write_to(&mut header);
    let mut d = StreamDecoder::new();
    d.push(&header);
    let want = FrameError::TooLarge {
        offset: 0,
        bytes: 1024 * 65536 * 8 + 40,
        limit: bwf1::DEFAULT_MAX_FRAME_BYTES as u64,
    };
    assert_eq!(d.next_frame(), Err(want));
    assert_eq!(d.next_frame(), Ok(None));
    assert!(
        d.buffer_capacity() < 1024,
        "capacity {}",
        d.buffer_capacity()
    );
    assert_eq!(d.stats().rejected(RejectReason::TooLarge), 1);
}

#[test]
fn a_large_frame_within_the_limit_is_not_reserved_ahead() {
    // 8 MiB announced, limit 64 MiB: the decoder waits, holding only what
    // was pushed.
    let h = Header::new(SampleFormat::F64, 16, 65536, 0, 0, 25_600.0);
    let mut header = Vec::new();
    h.write_to(&mut header);
    let mut d = StreamDecoder::with_max_frame_bytes(64 << 20);
    d.push(&header);
    assert_eq!(d.next_frame(), Ok(None));
    assert!(
        d.buffer_capacity() < 1024,
        "capacity {}",
        d.buffer_capacity()
    );
}

#[test]
fn junk_stream_keeps_the_buffer_small() {
    let mut d = StreamDecoder::new();
    let junk = vec![b'B'; 1000];
    for _ in 0..1000 {
        d.push(&junk);
        assert!(drain(&mut d).0.is_empty());
        assert!(
            d.buffer_capacity() <= 4096,
            "capacity {}",
            d.buffer_capacity()
        );
    }
    let s = d.stats();
    assert_eq!(s.rejected(RejectReason::BadMagic), 1);
    assert_eq!(s.bytes_skipped + d.buffered() as u64, 1_000_000);
}

#[test]
fn samples_buffer_is_reused_across_frames() {
    let (bytes, _) = p2_stream(6, 100);
    let mut d = StreamDecoder::new();
    d.push(&bytes);
    let mut samples = Samples::default();
    d.next_frame_into(&mut samples).unwrap().unwrap();
    let Samples::I32(v) = &samples else { panic!() };
    let ptr = v.as_ptr();
    while let Some(h) = d.next_frame_into(&mut samples).unwrap() {
        let Samples::I32(v) = &samples else { panic!() };
        assert_eq!(v.as_ptr(), ptr, "reallocated at frame {}", h.first_sample);
    }
}

#[test]
fn datagram_crc_mismatch_reports_both_values() {
    let mut f = small_frame(0);
    let n = f.len();
    let stored = u32::from_le_bytes(f[n - 4..].try_into().unwrap());
    f[40] ^= 0x01;
    let actual = crc32_bitwise(&f[..n - 4]);
    assert_eq!(
        decode_datagram(&f),
        Err(FrameError::CrcMismatch {
            offset: 0,
            expected: stored,
            actual
        })
    );
    let mut d = DatagramDecoder::new();
    let mut s = Samples::default();
    assert!(d.decode(&f, &mut s).is_err());
    assert!(s.is_empty(), "samples untouched on error");
    assert_eq!(
        (d.stats().crc_errors, d.stats().bytes_skipped),
        (1, n as u64)
    );
}

#[test]
fn encoder_refuses_what_the_decoder_would() {
    let h = Header::new(SampleFormat::I16, 2, 2, 0, 0, 1.0);
    assert_eq!(
        encode(&h, SampleSlice::I16(&[1, 2, 3])),
        Err(EncodeError::CountMismatch {
            expected: 4,
            given: 3
        })
    );
    let bad = Header::new(SampleFormat::I16, 0, 2, 0, 0, 1.0);
    assert!(matches!(
        encode(&bad, SampleSlice::I16(&[])),
        Err(EncodeError::Header(FrameError::BadChannelCount { .. }))
    ));
    let h24 = Header::new(SampleFormat::I24, 1, 1, 0, 0, 1.0);
    assert_eq!(
        encode(&h24, SampleSlice::I32(&[I24_MIN - 1])),
        Err(EncodeError::I24OutOfRange {
            index: 0,
            value: I24_MIN - 1
        })
    );
    let mut out = vec![9u8];
    assert!(bwf1::encode_into(&h24, SampleSlice::I32(&[I24_MAX + 1]), &mut out).is_err());
    assert_eq!(out, vec![9u8], "output untouched on error");
}
