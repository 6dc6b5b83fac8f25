//! Committed sample streams (tests/data/) and the fuzz seed corpus
//! (fuzz/corpus/), with the generator that writes them.
//!
//! The files are made by the encoders from `frame_common::p2_counts`
//! (integer arithmetic only, so the same on every machine). To rewrite them
//! after an intended change of the generator or the format:
//!
//! ```text
//! BANDWATCH_WRITE_FRAME_DATA=1 cargo test --test frame_data
//! ```
//!
//! Without the variable the tests check that the committed bytes are what
//! the generator makes now (a golden check on the encoders) and that the
//! decoders give back the generator's values (the round trip).
#![allow(clippy::unwrap_used)] // tests may unwrap: a panic is a failed test

mod frame_common;

use std::fmt::Write as _;
use std::path::{Path, PathBuf};

use bandwatch::frame::bwf1::{self, Header, StreamDecoder};
use bandwatch::frame::lines::{LineBatch, LineDecoder};
use bandwatch::frame::raw::RawDecoder;
use bandwatch::frame::{encode_samples, SampleFormat, SampleSlice, Samples};
use frame_common::{p2_counts, p2_stream, refresh_crc, P2_CHANNELS, P2_RATE_HZ};

const BWF1_FILE: &str = "tests/data/p2_i24.bwf1";
const LINES_FILE: &str = "tests/data/p2_g.lines";
const RAW_FILE: &str = "tests/data/p2_i16.raw";

/// 100 mV/g into a ±10 V 24-bit converter: g per count (the demo scenario's
/// sensitivity; the converter span is our choice for this file).
const G_PER_COUNT: f64 = 10.0 / 8_388_608.0 / 0.1;

fn path(rel: &str) -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join(rel)
}

fn writing() -> bool {
    std::env::var_os("BANDWATCH_WRITE_FRAME_DATA").is_some()
}

/// Compares `bytes` with the committed file, or writes it when asked.
fn golden(rel: &str, bytes: &[u8]) -> Vec<u8> {
    let p = path(rel);
    if writing() {
        std::fs::create_dir_all(p.parent().unwrap()).unwrap();
        std::fs::write(&p, bytes).unwrap();
    }
    let committed = std::fs::read(&p).unwrap_or_else(|e| panic!("{}: {e}", p.display()));
    assert!(
        committed == bytes,
        "{rel} differs from what the generator makes now"
    );
    committed
}

fn bwf1_bytes() -> (Vec<u8>, Vec<(Header, Vec<i32>)>) {
    p2_stream(4, 256)
}

fn lines_values() -> Vec<f64> {
    p2_counts(0, 200)
        .into_iter()
        .map(|c| f64::from(c) * G_PER_COUNT)
        .collect()
}

fn lines_text() -> String {
    let mut t = String::new();
    writeln!(
        t,
        "# P2 cooling-water pump, acceleration in g, {P2_RATE_HZ} Hz"
    )
    .unwrap();
    writeln!(t, "# {}", P2_CHANNELS.join(", ")).unwrap();
    for (k, inst) in lines_values().chunks_exact(3).enumerate() {
        if k == 100 {
            // A blank line and a comment mid-stream: both are skipped.
            t.push_str("\r\n# half way\n");
        }
        // `{}` on f64 prints the shortest text that parses back to the
        // same value (Rust std documentation), so parse(text) == value.
        match k % 3 {
            0 => writeln!(t, "{}, {}, {}", inst[0], inst[1], inst[2]),
            1 => writeln!(t, "{} {}\t{}", inst[0], inst[1], inst[2]),
            _ => write!(t, "{},{},{}\r\n", inst[0], inst[1], inst[2]),
        }
        .unwrap();
    }
    t
}

fn raw_values() -> Vec<i16> {
    p2_counts(0, 300)
        .into_iter()
        .map(|c| (c >> 8) as i16)
        .collect()
}

fn raw_bytes() -> Vec<u8> {
    let mut out = Vec::new();
    encode_samples(SampleFormat::I16, SampleSlice::I16(&raw_values()), &mut out).unwrap();
    out
}

#[test]
fn bwf1_sample_stream() {
    let (bytes, parts) = bwf1_bytes();
    let committed = golden(BWF1_FILE, &bytes);
    let mut d = StreamDecoder::new();
    // Odd chunk size, so frames straddle pushes.
    for chunk in committed.chunks(1000) {
        d.push(chunk);
    }
    for (h, counts) in &parts {
        let f = d.next_frame().unwrap().unwrap();
        assert_eq!(&f.header, h);
        assert_eq!(f.samples, Samples::I32(counts.clone()));
    }
    assert_eq!(d.next_frame(), Ok(None));
    assert_eq!(d.finish(), Ok(()));
}

#[test]
fn lines_sample_stream() {
    let text = lines_text();
    let committed = golden(LINES_FILE, text.as_bytes());
    let mut d = LineDecoder::new(3);
    let mut out = LineBatch::default();
    let mut got = Vec::new();
    for chunk in committed.chunks(77) {
        d.feed(chunk, &mut out);
        assert_eq!(out.errors().count(), 0);
        got.extend_from_slice(&out.values);
    }
    d.finish(&mut out);
    assert!(out.values.is_empty());
    let want = lines_values();
    assert_eq!(got.len(), want.len());
    assert!(got
        .iter()
        .zip(&want)
        .all(|(a, b)| a.to_bits() == b.to_bits()));
    assert_eq!(d.stats().comments, 3);
    assert_eq!(d.stats().blank, 1);
}

#[test]
fn raw_sample_stream() {
    let committed = golden(RAW_FILE, &raw_bytes());
    let mut d = RawDecoder::new(SampleFormat::I16, 3).unwrap();
    let mut out = Samples::default();
    let mut got = Vec::new();
    for chunk in committed.chunks(7) {
        d.feed(chunk, &mut out);
        let Samples::I16(v) = &out else { panic!() };
        got.extend_from_slice(v);
    }
    assert_eq!(got, raw_values());
    assert_eq!(d.pending_bytes(), 0);
}

/// The seed corpus: control byte first (see fuzz/src/lib.rs), then data.
fn corpus() -> Vec<(&'static str, &'static str, Vec<u8>)> {
    let (stream, parts) = p2_stream(3, 8);
    let len = parts[0].0.frame_bytes() as usize;
    let with = |ctl: u8, body: &[u8]| {
        let mut v = vec![ctl];
        v.extend_from_slice(body);
        v
    };
    let mut flipped = stream.clone();
    flipped[len + 40] ^= 0x55;
    let mut bad_header = stream.clone();
    bad_header[len + 6] = 0;
    refresh_crc(&mut bad_header[len..2 * len]);
    let mut junk = b"xxBWBWF".to_vec();
    junk.extend_from_slice(&stream);
    let mut huge = Vec::new();
    Header::new(SampleFormat::F64, 1024, 65536, 0, 0, 1.0).write_to(&mut huge);

    let mut one_of_each = Vec::new();
    for format in SampleFormat::ALL {
        let h = Header::new(format, 2, 2, 4, 0, 100.0);
        let s = match format {
            SampleFormat::I16 => SampleSlice::I16(&[1, -1, i16::MIN, i16::MAX]),
            SampleFormat::I24 => {
                SampleSlice::I32(&[bandwatch::frame::I24_MIN, -1, 0, bandwatch::frame::I24_MAX])
            }
            SampleFormat::I32 => SampleSlice::I32(&[i32::MIN, -1, 0, i32::MAX]),
            SampleFormat::F32 => SampleSlice::F32(&[f32::NAN, -0.0, 1.5, f32::INFINITY]),
            SampleFormat::F64 => SampleSlice::F64(&[f64::NAN, -0.0, 1.5, f64::NEG_INFINITY]),
        };
        one_of_each.push((format, bwf1::encode(&h, s).unwrap()));
    }
    let mut trailing = one_of_each[0].1.clone();
    trailing.push(0);

    let text = lines_text().into_bytes();
    let mut v = vec![
        ("bwf1_stream", "valid_3_frames_chunk_1", with(0, &stream)),
        ("bwf1_stream", "valid_3_frames_chunk_37", with(36, &stream)),
        ("bwf1_stream", "truncated", with(5, &stream[..2 * len + 20])),
        ("bwf1_stream", "crc_flipped_middle", with(63, &flipped)),
        ("bwf1_stream", "bad_channels_middle", with(10, &bad_header)),
        ("bwf1_stream", "junk_then_frames", with(3, &junk)),
        ("bwf1_stream", "huge_header", with(0, &huge)),
        ("bwf1_datagram", "truncated", stream[..len - 1].to_vec()),
        ("bwf1_datagram", "two_frames", stream[..2 * len].to_vec()),
        (
            "bwf1_datagram",
            "crc_flipped",
            flipped[len..2 * len].to_vec(),
        ),
        (
            "bwf1_datagram",
            "bad_channels",
            bad_header[len..2 * len].to_vec(),
        ),
        ("bwf1_datagram", "trailing_byte", trailing),
        ("bwf1_datagram", "huge_header", huge.clone()),
        ("lines", "p2_3ch", with(128, &text[..600])),
        (
            "lines",
            "bad_lines_2ch",
            with(64 + 5, b"1 2\n3\nx y\n1,,2\n\xff\n4,5\r\n6 7"),
        ),
        ("lines", "long_line_1ch", with(7, &[b'9'; 200])),
        ("lines", "comments_1ch", with(1, b"# a\n\n  # b\n1\n2\r\n")),
        ("raw", "i16_3ch", with(2 * 5, &raw_bytes()[..120])),
        ("raw", "i24_2ch", with(4 + 5, &stream[40..100])),
        ("raw", "f64_1ch_chunk_3", with(3 + 80, &stream[..64])),
    ];
    for (format, frame) in one_of_each {
        let name = match format {
            SampleFormat::I16 => "valid_i16",
            SampleFormat::I24 => "valid_i24",
            SampleFormat::I32 => "valid_i32",
            SampleFormat::F32 => "valid_f32",
            SampleFormat::F64 => "valid_f64",
        };
        v.push(("bwf1_datagram", name, frame));
    }
    v
}

#[test]
fn fuzz_seed_corpus() {
    for (target, name, bytes) in corpus() {
        golden(&format!("fuzz/corpus/{target}/{name}"), &bytes);
    }
}
