//! The `lines` text framing through the public API.
#![allow(clippy::unwrap_used)] // tests may unwrap: a panic is a failed test

use bandwatch::frame::lines::{LineBatch, LineDecoder, LineError, LineEvent, LineRejectReason};
use proptest::prelude::*;

/// Feeds `bytes` in chunks of the given sizes (cycled), then finishes;
/// returns every good instant's values and every error, in order, with the
/// instant index of each value.
fn decode(d: &mut LineDecoder, bytes: &[u8], sizes: &[usize]) -> (Vec<(u64, f64)>, Vec<LineError>) {
    let mut out = LineBatch::default();
    let (mut values, mut errors) = (Vec::new(), Vec::new());
    let (mut at, mut k) = (0, 0);
    while at < bytes.len() {
        let n = sizes[k % sizes.len()].max(1).min(bytes.len() - at);
        d.feed(&bytes[at..at + n], &mut out);
        collect(&out, &mut values, &mut errors);
        at += n;
        k += 1;
    }
    d.finish(&mut out);
    collect(&out, &mut values, &mut errors);
    (values, errors)
}

/// The channel count the tests below use.
const C: usize = 3;

fn collect(out: &LineBatch, values: &mut Vec<(u64, f64)>, errors: &mut Vec<LineError>) {
    for e in &out.events {
        match e {
            LineEvent::Run {
                first_sample,
                values: r,
            } => {
                for (k, v) in out.values[r.clone()].iter().enumerate() {
                    values.push((first_sample + (k / C) as u64, *v));
                }
            }
            LineEvent::Rejected(err) => errors.push(err.clone()),
        }
    }
}

proptest! {
    /// Finite values written with `{}` (shortest text that parses back to
    /// the same f64, per the Rust std docs), with mixed separators,
    /// comments, blank lines and CRLF, in random chunks, come back bit for
    /// bit.
    #[test]
    fn text_round_trip(
        rows in proptest::collection::vec(
            (proptest::array::uniform3(any::<u64>().prop_map(f64::from_bits).prop_filter("finite", |v| v.is_finite())),
             0usize..4, 0usize..5),
            1..60),
        sizes in proptest::collection::vec(1usize..50, 1..6),
    ) {
        let mut text = String::new();
        for (row, sep, extra) in &rows {
            match extra {
                0 => text.push_str("# comment, 1 2 3\n"),
                1 => text.push_str("\r\n"),
                2 => text.push_str("   \t\n"),
                _ => {}
            }
            let sep = [", ", " ", ",", "\t "][*sep];
            text.push_str(&format!("{}{sep}{}{sep}{}", row[0], row[1], row[2]));
            text.push_str(if *extra == 4 { "\r\n" } else { "\n" });
        }
        let mut d = LineDecoder::new(C);
        let (values, errors) = decode(&mut d, text.as_bytes(), &sizes);
        prop_assert!(errors.is_empty(), "{:?}", errors);
        let want: Vec<u64> = rows.iter().flat_map(|(r, _, _)| r.iter().map(|v| v.to_bits())).collect();
        let got: Vec<u64> = values.iter().map(|(_, v)| v.to_bits()).collect();
        prop_assert_eq!(got, want);
        // Instant indices count up by one per line.
        for (i, (idx, _)) in values.iter().enumerate() {
            prop_assert_eq!(*idx, (i / C) as u64);
        }
        prop_assert_eq!(d.stats().instants, rows.len() as u64);
    }

    /// Chunking never changes the outcome, bad lines included.
    #[test]
    fn chunking_is_invisible(
        text in proptest::collection::vec(prop_oneof![
            Just("1 2 3\n"), Just("4,5\n"), Just("x 1 2\n"), Just("# c\n"), Just("\n"),
            Just("7,,8,9\n"), Just("1 2 3 4\r\n"), Just("9, 9, 9\r\n")], 0..30),
        sizes in proptest::collection::vec(1usize..20, 1..6),
    ) {
        let bytes = text.concat().into_bytes();
        let mut a = LineDecoder::new(C);
        let mut b = LineDecoder::new(C);
        let chunked = decode(&mut a, &bytes, &sizes);
        let whole = decode(&mut b, &bytes, &[bytes.len().max(1)]);
        prop_assert_eq!(chunked, whole);
        prop_assert_eq!(a.stats(), b.stats());
    }
}

#[test]
fn a_bad_line_is_a_break_between_runs() {
    let mut d = LineDecoder::new(C);
    let mut out = LineBatch::default();
    d.feed(b"# start\n1 2 3\n4 5 6\n7 8\n9 10 11\n", &mut out);
    assert_eq!(
        out.events,
        vec![
            LineEvent::Run {
                first_sample: 0,
                values: 0..6
            },
            LineEvent::Rejected(LineError::WrongCount {
                line: 4,
                expected: 3,
                found: 2
            }),
            // The bad line used instant index 2: the caller sees the gap.
            LineEvent::Run {
                first_sample: 3,
                values: 6..9
            },
        ]
    );
    assert_eq!(d.stats().rejected(LineRejectReason::WrongCount), 1);
}

#[test]
fn over_long_line_is_dropped_without_buffering_it() {
    let limit = 100;
    let mut d = LineDecoder::with_max_line_bytes(1, limit);
    let mut out = LineBatch::default();
    d.feed(b"1\n", &mut out);
    assert_eq!(out.values, vec![1.0]);
    // A 1 MB line with no LF yet, in 1 KiB chunks.
    let chunk = vec![b'5'; 1024];
    let mut errors = Vec::new();
    for _ in 0..1024 {
        d.feed(&chunk, &mut out);
        errors.extend(out.errors().cloned());
        assert!(out.values.is_empty());
        assert!(
            d.buffer_capacity() <= 2 * limit,
            "capacity {}",
            d.buffer_capacity()
        );
    }
    assert_eq!(errors, vec![LineError::TooLong { line: 2, limit }]);
    // The rest of the long line, then good lines: numbering carries on.
    d.feed(b"555\n2\n", &mut out);
    assert_eq!(out.values, vec![2.0]);
    assert!(out.errors().next().is_none());
    d.feed(b"x\n", &mut out);
    assert_eq!(
        out.errors().next(),
        Some(&LineError::BadNumber {
            line: 4,
            field: 1,
            text: "x".into()
        })
    );
    assert_eq!(d.stats().bytes_dropped, 1024 * 1024 + 3);
}

#[test]
fn line_at_the_limit_is_accepted_one_past_is_not() {
    let mut d = LineDecoder::with_max_line_bytes(1, 4);
    let mut out = LineBatch::default();
    d.feed(b"1234\n12345\n", &mut out);
    assert_eq!(out.values, vec![1234.0]);
    assert_eq!(
        out.errors().collect::<Vec<_>>(),
        vec![&LineError::TooLong { line: 2, limit: 4 }]
    );
}

#[test]
fn bad_number_text_is_bounded_in_the_error() {
    let mut d = LineDecoder::new(1);
    let mut out = LineBatch::default();
    let long = format!("{}\n", "z".repeat(500));
    d.feed(long.as_bytes(), &mut out);
    let Some(LineError::BadNumber { text, .. }) = out.errors().next() else {
        panic!("{:?}", out.events)
    };
    assert_eq!(text.len(), 32);
}

#[test]
fn reset_drops_the_partial_line_and_restarts_line_numbers() {
    let mut d = LineDecoder::new(1);
    let mut out = LineBatch::default();
    d.feed(b"1\n2\n1.2", &mut out);
    assert_eq!(d.reset(), 3);
    // "1.25" was cut by the reconnect: the "1.2" must not become a value.
    d.feed(b"x\n", &mut out);
    assert_eq!(
        out.errors().next(),
        Some(&LineError::BadNumber {
            line: 1,
            field: 1,
            text: "x".into()
        })
    );
    d.feed(b"3\n", &mut out);
    let LineEvent::Run { first_sample, .. } = &out.events[0] else {
        panic!()
    };
    // Indices keep counting across the reset: 0, 1, then x = 2, 3 = 3.
    assert_eq!(*first_sample, 3);
}
