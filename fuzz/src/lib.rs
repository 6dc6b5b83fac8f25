//! Fuzz harness for the framing decoders: one function per fuzz target.
//!
//! Each function feeds arbitrary bytes to a decoder and panics only when an
//! invariant breaks; a decoder error on bad input is expected and fine. The
//! same file is compiled into the main crate's `tests/frame_corpus.rs`,
//! which replays the committed corpus through it on stable Rust.
//!
//! The first input byte is a control byte (chunk size, channel count,
//! format), so the fuzzer also explores how input is split across pushes.
//!
//! Invariants checked:
//! - no panic, whatever the input;
//! - memory stays bounded by the configured limits, not by the input;
//! - every byte pushed is accounted for (in a frame, skipped or buffered);
//! - splitting the input into chunks changes nothing: same frames, same
//!   errors, same counters as one push of the whole input;
//! - a good BWF1 frame re-encodes to exactly the bytes it came from.

use bandwatch::frame::bwf1::{self, FrameError, Header, StreamDecoder};
use bandwatch::frame::lines::{LineBatch, LineDecoder, LineError, LineEvent};
use bandwatch::frame::raw::RawDecoder;
use bandwatch::frame::{SampleFormat, Samples};

/// Frame size limit for the stream target: small, so the fuzzer reaches it.
pub const STREAM_LIMIT: usize = 1 << 16;
/// Line length limit for the lines target: small, so the fuzzer reaches it.
pub const LINE_LIMIT: usize = 64;

/// What a stream decoder said, in order.
#[derive(Debug, PartialEq)]
enum StreamEvent {
    /// A good frame: its offset and its bytes re-encoded.
    Frame(u64, Vec<u8>),
    Error(FrameError),
}

fn drain(d: &mut StreamDecoder, samples: &mut Samples, events: &mut Vec<StreamEvent>) {
    loop {
        match d.next_frame_into(samples) {
            Ok(Some(h)) => {
                assert_eq!(samples.len() as u64, h.sample_count());
                let bytes = reencode(&h, samples);
                let start = d.stream_offset() - bytes.len() as u64;
                events.push(StreamEvent::Frame(start, bytes));
            }
            Ok(None) => return,
            Err(e) => {
                // Display must not panic either.
                let _ = e.to_string();
                events.push(StreamEvent::Error(e));
            }
        }
    }
}

fn reencode(h: &Header, samples: &Samples) -> Vec<u8> {
    match bwf1::encode(h, samples.as_slice()) {
        Ok(b) => b,
        Err(e) => panic!("a decoded frame does not re-encode: {e}"),
    }
}

fn check_accounting(d: &StreamDecoder) {
    let s = d.stats();
    assert_eq!(
        s.bytes_in,
        s.frame_bytes + s.bytes_skipped + d.buffered() as u64,
        "bytes unaccounted for: {s:?}, buffered {}",
        d.buffered()
    );
}

/// BWF1 byte stream, pushed in chunks of 1..=64 bytes.
pub fn bwf1_stream(data: &[u8]) {
    let Some((&ctl, data)) = data.split_first() else {
        return;
    };
    let chunk = usize::from(ctl % 64) + 1;
    let mut d = StreamDecoder::with_max_frame_bytes(STREAM_LIMIT);
    let mut samples = Samples::default();
    let mut events = Vec::new();
    for part in data.chunks(chunk) {
        d.push(part);
        drain(&mut d, &mut samples, &mut events);
        // Drained: what is left is a partial frame under the limit.
        assert!(d.buffered() < STREAM_LIMIT, "buffered {}", d.buffered());
        assert!(
            d.buffer_capacity() <= 4 * STREAM_LIMIT + 2 * chunk,
            "capacity {}",
            d.buffer_capacity()
        );
        check_accounting(&d);
    }
    for e in &events {
        if let StreamEvent::Frame(start, bytes) = e {
            let start = *start as usize;
            assert_eq!(&data[start..start + bytes.len()], &bytes[..]);
        }
    }

    let mut whole = StreamDecoder::with_max_frame_bytes(STREAM_LIMIT);
    let mut whole_events = Vec::new();
    whole.push(data);
    drain(&mut whole, &mut samples, &mut whole_events);
    assert_eq!(events, whole_events, "chunking changed the outcome");
    assert_eq!(d.stats(), whole.stats());

    let end = d.finish();
    let whole_end = whole.finish();
    assert_eq!(end, whole_end);
    assert_eq!(d.buffered(), 0);
    check_accounting(&d);
}

/// One UDP datagram.
pub fn bwf1_datagram(data: &[u8]) {
    let mut dec = bwf1::DatagramDecoder::new();
    let mut samples = Samples::default();
    match dec.decode(data, &mut samples) {
        Ok(h) => {
            assert_eq!(reencode(&h, &samples), data);
            assert_eq!(dec.stats().frames, 1);
        }
        Err(e) => {
            let _ = e.to_string();
            assert!(e.offset() <= data.len() as u64, "{e} beyond the datagram");
            assert_eq!(dec.stats().rejected(e.reason()), 1);
        }
    }
    let s = dec.stats();
    assert_eq!(s.bytes_in, s.frame_bytes + s.bytes_skipped);
    assert_eq!(bwf1::decode_datagram(data).is_ok(), s.frames == 1);
}

#[derive(Debug, PartialEq)]
enum LineOut {
    Instant(u64, Vec<u64>),
    Error(LineError),
}

fn flatten_lines(d: &LineDecoder, batch: &LineBatch, out: &mut Vec<LineOut>) {
    let c = d.channels();
    let mut next = 0;
    for e in &batch.events {
        match e {
            LineEvent::Run {
                first_sample,
                values,
            } => {
                assert_eq!(values.start, next, "runs must tile the values");
                assert!(values.end > values.start);
                assert_eq!(values.len() % c, 0);
                next = values.end;
                for (k, inst) in batch.values[values.clone()].chunks_exact(c).enumerate() {
                    let bits = inst.iter().map(|v| v.to_bits()).collect();
                    out.push(LineOut::Instant(first_sample + k as u64, bits));
                }
            }
            LineEvent::Rejected(err) => {
                let _ = err.to_string();
                out.push(LineOut::Error(err.clone()));
            }
        }
    }
    assert_eq!(next, batch.values.len(), "values outside any run");
}

/// `lines` text with 1..=4 channels, lines of at most [`LINE_LIMIT`] bytes.
pub fn lines(data: &[u8]) {
    let Some((&ctl, data)) = data.split_first() else {
        return;
    };
    let chunk = usize::from(ctl % 64) + 1;
    let channels = usize::from(ctl >> 6) + 1;
    let mut d = LineDecoder::with_max_line_bytes(channels, LINE_LIMIT);
    let mut batch = LineBatch::default();
    let mut got = Vec::new();
    for part in data.chunks(chunk) {
        d.feed(part, &mut batch);
        flatten_lines(&d, &batch, &mut got);
        assert!(d.pending_bytes() <= LINE_LIMIT);
        assert!(d.buffer_capacity() <= 2 * LINE_LIMIT + 2 * chunk);
    }
    d.finish(&mut batch);
    flatten_lines(&d, &batch, &mut got);

    let mut whole = LineDecoder::with_max_line_bytes(channels, LINE_LIMIT);
    let mut want = Vec::new();
    whole.feed(data, &mut batch);
    flatten_lines(&whole, &batch, &mut want);
    whole.finish(&mut batch);
    flatten_lines(&whole, &batch, &mut want);
    assert_eq!(got, want, "chunking changed the outcome");
    assert_eq!(d.stats(), whole.stats());
    let s = d.stats();
    assert_eq!(
        s.instants + s.rejected_total(),
        got.len() as u64,
        "every instant or rejection is reported once"
    );
}

fn sample_bits(s: &Samples) -> Vec<u64> {
    match s {
        Samples::I16(v) => v.iter().map(|&x| x as u64).collect(),
        Samples::I32(v) => v.iter().map(|&x| x as u64).collect(),
        Samples::F32(v) => v.iter().map(|&x| u64::from(x.to_bits())).collect(),
        Samples::F64(v) => v.iter().map(|&x| x.to_bits()).collect(),
    }
}

/// Raw samples: control byte picks format, channels (1..=8) and chunking.
pub fn raw(data: &[u8]) {
    let Some((&ctl, data)) = data.split_first() else {
        return;
    };
    let format = SampleFormat::ALL[usize::from(ctl % 5)];
    let channels = usize::from((ctl / 5) % 8) + 1;
    let chunk = usize::from(ctl / 40) + 1;
    let Ok(mut d) = RawDecoder::new(format, channels) else {
        panic!("1..=8 channels must be accepted");
    };
    let mut out = Samples::default();
    let mut got = Vec::new();
    let mut next = 0u64;
    for part in data.chunks(chunk) {
        let b = d.feed(part, &mut out);
        assert_eq!(b.first_sample, next);
        assert_eq!(out.len(), b.instants * channels);
        next += b.instants as u64;
        got.extend(sample_bits(&out));
        assert!(d.pending_bytes() < d.instant_bytes());
    }
    let Ok(mut whole) = RawDecoder::new(format, channels) else {
        panic!("1..=8 channels must be accepted");
    };
    let b = whole.feed(data, &mut out);
    assert_eq!(b.instants as u64, next);
    assert_eq!(sample_bits(&out), got, "chunking changed the samples");
    assert_eq!(
        data.len() % d.instant_bytes(),
        d.pending_bytes(),
        "the partial instant is exactly the remainder"
    );
    assert_eq!(d.reset(), whole.reset());
}
