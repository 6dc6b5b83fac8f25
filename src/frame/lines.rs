//! `lines`: a text framing for devices that cannot speak BWF1.
//!
//! One instant per line: C numbers separated by commas and/or white space
//! (`1.5, -2`, `1.5 -2`, `1.5,-2` are the same instant). A line whose first
//! non-blank character is `#` is a comment; blank lines are ignored; a CR
//! before the LF is dropped. An empty field (`1,,2`, a leading or trailing
//! comma) is an error, as are a wrong count, a field that is not a number,
//! bytes that are not UTF-8, and a line longer than the limit. Each bad line
//! is counted, reported with its line number and breaks the run of instants,
//! so the caller can mark a discontinuity.
//!
//! Numbers are parsed with Rust's `f64` parser (`1e-3`, `.5`, `+2` are
//! fine). `nan` and `inf` parse too and are passed on: the ring counts
//! non-finite samples, as it does for BWF1 floats.
//!
//! Memory is bounded: the decoder keeps at most one partial line of at most
//! `max_line_bytes`; an over-long line is dropped up to its newline without
//! being buffered. Output grows with the input of one [`LineDecoder::feed`].

use std::ops::Range;

/// Default longest line, in bytes before the LF (a CR counts): room for
/// 1024 channels of 60-character numbers.
pub const DEFAULT_MAX_LINE_BYTES: usize = 64 * 1024;

/// Longest field text kept in a [`LineError::BadNumber`].
const MAX_ERROR_TEXT: usize = 32;

/// A rejected line. `line` is 1-based, counting every line since the decoder
/// was made or last reset (comments and blank lines included).
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
pub enum LineError {
    #[error("line {line}: {found} values, expected {expected}")]
    WrongCount {
        line: u64,
        expected: usize,
        found: usize,
    },
    #[error("line {line}, field {field}: {text:?} is not a number")]
    BadNumber {
        line: u64,
        field: usize,
        text: String,
    },
    #[error("line {line}, field {field}: empty field")]
    EmptyField { line: u64, field: usize },
    #[error("line {line}: longer than {limit} bytes, dropped")]
    TooLong { line: u64, limit: usize },
    #[error("line {line}, byte {column}: not UTF-8")]
    NotUtf8 { line: u64, column: usize },
}

/// The kind of a [`LineError`], for counting and metric labels.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum LineRejectReason {
    WrongCount,
    BadNumber,
    EmptyField,
    TooLong,
    NotUtf8,
}

impl LineRejectReason {
    pub const ALL: [LineRejectReason; 5] = [
        LineRejectReason::WrongCount,
        LineRejectReason::BadNumber,
        LineRejectReason::EmptyField,
        LineRejectReason::TooLong,
        LineRejectReason::NotUtf8,
    ];

    /// Snake-case name, usable as a metric label value.
    pub const fn as_str(self) -> &'static str {
        match self {
            LineRejectReason::WrongCount => "wrong_count",
            LineRejectReason::BadNumber => "bad_number",
            LineRejectReason::EmptyField => "empty_field",
            LineRejectReason::TooLong => "too_long",
            LineRejectReason::NotUtf8 => "not_utf8",
        }
    }
}

impl LineError {
    pub fn reason(&self) -> LineRejectReason {
        match self {
            LineError::WrongCount { .. } => LineRejectReason::WrongCount,
            LineError::BadNumber { .. } => LineRejectReason::BadNumber,
            LineError::EmptyField { .. } => LineRejectReason::EmptyField,
            LineError::TooLong { .. } => LineRejectReason::TooLong,
            LineError::NotUtf8 { .. } => LineRejectReason::NotUtf8,
        }
    }

    /// The 1-based line number the error names.
    pub fn line(&self) -> u64 {
        match *self {
            LineError::WrongCount { line, .. }
            | LineError::BadNumber { line, .. }
            | LineError::EmptyField { line, .. }
            | LineError::TooLong { line, .. }
            | LineError::NotUtf8 { line, .. } => line,
        }
    }
}

/// What one [`LineDecoder::feed`] produced, in stream order.
#[derive(Debug, Clone, PartialEq)]
pub enum LineEvent {
    /// Consecutive good instants: `batch.values[values]`, interleaved, C per
    /// instant. `first_sample` is the decoder's running instant index.
    Run {
        first_sample: u64,
        values: Range<usize>,
    },
    /// A bad line: the stream broke here (mark a discontinuity).
    Rejected(LineError),
}

/// Output of [`LineDecoder::feed`], reused across calls.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct LineBatch {
    /// Every good instant of the feed, interleaved by instant.
    pub values: Vec<f64>,
    /// Runs and rejections in the order they occurred.
    pub events: Vec<LineEvent>,
}

impl LineBatch {
    pub fn clear(&mut self) {
        self.values.clear();
        self.events.clear();
    }

    /// The rejections of this batch.
    pub fn errors(&self) -> impl Iterator<Item = &LineError> {
        self.events.iter().filter_map(|e| match e {
            LineEvent::Rejected(err) => Some(err),
            LineEvent::Run { .. } => None,
        })
    }
}

/// Counters of one line decoder, for metrics. Monotonic.
#[derive(Debug, Clone, Default, PartialEq, Eq)]
pub struct LineStats {
    pub bytes_in: u64,
    /// Complete lines seen (any kind).
    pub lines: u64,
    /// Good instants produced.
    pub instants: u64,
    pub comments: u64,
    pub blank: u64,
    /// Bytes dropped: over-long lines, a partial line at a reset.
    pub bytes_dropped: u64,
    rejected: [u64; LineRejectReason::ALL.len()],
}

impl LineStats {
    pub fn rejected(&self, reason: LineRejectReason) -> u64 {
        self.rejected[reason as usize]
    }

    pub fn rejected_total(&self) -> u64 {
        self.rejected.iter().sum()
    }
}

/// Incremental decoder for the `lines` framing.
#[derive(Debug)]
pub struct LineDecoder {
    channels: usize,
    max_line_bytes: usize,
    /// The current line so far (no LF yet), at most `max_line_bytes`.
    partial: Vec<u8>,
    /// The current line was too long and is being dropped up to its LF.
    discarding: bool,
    /// 1-based number of the line being read.
    line: u64,
    /// Index of the next instant; a rejected line uses one index, so a bad
    /// line also shows as a gap of one instant.
    next_sample: u64,
    stats: LineStats,
}

impl LineDecoder {
    /// A decoder for `channels` numbers per line, lines of at most
    /// [`DEFAULT_MAX_LINE_BYTES`].
    pub fn new(channels: usize) -> LineDecoder {
        LineDecoder::with_max_line_bytes(channels, DEFAULT_MAX_LINE_BYTES)
    }

    pub fn with_max_line_bytes(channels: usize, max_line_bytes: usize) -> LineDecoder {
        LineDecoder {
            channels,
            max_line_bytes,
            partial: Vec::new(),
            discarding: false,
            line: 1,
            next_sample: 0,
            stats: LineStats::default(),
        }
    }

    pub fn channels(&self) -> usize {
        self.channels
    }

    /// Decodes every complete line in `bytes` (with the partial line kept
    /// from before) into `out`, which is cleared first. The last partial
    /// line is kept for the next call.
    pub fn feed(&mut self, bytes: &[u8], out: &mut LineBatch) {
        out.clear();
        self.stats.bytes_in += bytes.len() as u64;
        let mut rest = bytes;
        while !rest.is_empty() {
            let Some(nl) = rest.iter().position(|&b| b == b'\n') else {
                self.keep_partial(rest, out);
                break;
            };
            let (seg, tail) = rest.split_at(nl);
            rest = &tail[1..];
            if self.discarding {
                self.stats.bytes_dropped += seg.len() as u64;
                self.discarding = false;
                self.end_line();
            } else if self.partial.len() + seg.len() > self.max_line_bytes {
                self.stats.bytes_dropped += (self.partial.len() + seg.len()) as u64;
                self.partial.clear();
                self.too_long(out);
                self.end_line();
            } else if self.partial.is_empty() {
                self.line_bytes(seg, out);
            } else {
                let mut line = std::mem::take(&mut self.partial);
                line.extend_from_slice(seg);
                self.line_bytes(&line, out);
                line.clear();
                self.partial = line;
            }
        }
    }

    /// End of input (a file's end): decodes a last line that has no LF.
    pub fn finish(&mut self, out: &mut LineBatch) {
        out.clear();
        if self.discarding {
            self.discarding = false;
            self.end_line();
        } else if !self.partial.is_empty() {
            let line = std::mem::take(&mut self.partial);
            self.line_bytes(&line, out);
        }
    }

    /// The connection broke: drops a partial line (counted) and starts line
    /// numbers at 1 again. Instant indices keep counting up, so a source's
    /// sequence stays monotonic; mark the reconnect as a discontinuity.
    /// Returns the bytes dropped.
    pub fn reset(&mut self) -> usize {
        let dropped = self.partial.len();
        self.stats.bytes_dropped += dropped as u64;
        self.partial.clear();
        self.discarding = false;
        self.line = 1;
        dropped
    }

    /// Bytes of the partial line held.
    pub fn pending_bytes(&self) -> usize {
        self.partial.len()
    }

    /// Capacity of the partial-line buffer (to check memory bounds).
    pub fn buffer_capacity(&self) -> usize {
        self.partial.capacity()
    }

    pub fn stats(&self) -> &LineStats {
        &self.stats
    }

    fn keep_partial(&mut self, rest: &[u8], out: &mut LineBatch) {
        if self.discarding {
            self.stats.bytes_dropped += rest.len() as u64;
        } else if self.partial.len() + rest.len() > self.max_line_bytes {
            // Report now, not at the LF: the caller learns of the break as
            // early as possible and nothing more of this line is kept.
            self.stats.bytes_dropped += (self.partial.len() + rest.len()) as u64;
            self.partial.clear();
            self.too_long(out);
            self.discarding = true;
        } else {
            self.partial.extend_from_slice(rest);
        }
    }

    fn too_long(&mut self, out: &mut LineBatch) {
        let err = LineError::TooLong {
            line: self.line,
            limit: self.max_line_bytes,
        };
        self.reject(err, out);
    }

    fn end_line(&mut self) {
        self.line += 1;
        self.stats.lines += 1;
    }

    fn reject(&mut self, err: LineError, out: &mut LineBatch) {
        self.stats.rejected[err.reason() as usize] += 1;
        self.next_sample += 1;
        out.events.push(LineEvent::Rejected(err));
    }

    /// One complete line, without its LF.
    fn line_bytes(&mut self, bytes: &[u8], out: &mut LineBatch) {
        let bytes = bytes.strip_suffix(b"\r").unwrap_or(bytes);
        let result = match std::str::from_utf8(bytes) {
            Ok(text) => self.parse_text(text, out),
            Err(e) => Err(LineError::NotUtf8 {
                line: self.line,
                column: e.valid_up_to() + 1,
            }),
        };
        match result {
            Ok(Kind::Blank) => self.stats.blank += 1,
            Ok(Kind::Comment) => self.stats.comments += 1,
            Ok(Kind::Instant(start)) => {
                let end = out.values.len();
                match out.events.last_mut() {
                    Some(LineEvent::Run { values, .. }) if values.end == start => values.end = end,
                    _ => out.events.push(LineEvent::Run {
                        first_sample: self.next_sample,
                        values: start..end,
                    }),
                }
                self.next_sample += 1;
                self.stats.instants += 1;
            }
            Err(err) => self.reject(err, out),
        }
        self.end_line();
    }

    /// Parses one line's text, appending its values to `out.values` only
    /// if the whole line is good.
    fn parse_text(&self, text: &str, out: &mut LineBatch) -> Result<Kind, LineError> {
        let trimmed = text.trim();
        if trimmed.is_empty() {
            return Ok(Kind::Blank);
        }
        if trimmed.starts_with('#') {
            return Ok(Kind::Comment);
        }
        let start = out.values.len();
        let result = self.parse_fields(trimmed, &mut out.values);
        if result.is_err() {
            out.values.truncate(start);
        }
        result.map(|()| Kind::Instant(start))
    }

    fn parse_fields(&self, text: &str, values: &mut Vec<f64>) -> Result<(), LineError> {
        let line = self.line;
        let mut found = 0usize;
        for piece in text.split(',') {
            let piece = piece.trim();
            if piece.is_empty() {
                return Err(LineError::EmptyField {
                    line,
                    field: found + 1,
                });
            }
            for token in piece.split_ascii_whitespace() {
                found += 1;
                if found > self.channels {
                    // Keep counting for the error; stop parsing.
                    continue;
                }
                match token.parse::<f64>() {
                    Ok(v) => values.push(v),
                    Err(_) => {
                        return Err(LineError::BadNumber {
                            line,
                            field: found,
                            text: token.chars().take(MAX_ERROR_TEXT).collect(),
                        })
                    }
                }
            }
        }
        if found != self.channels {
            return Err(LineError::WrongCount {
                line,
                expected: self.channels,
                found,
            });
        }
        Ok(())
    }
}

enum Kind {
    Blank,
    Comment,
    /// Good instant; its values start at this index of `out.values`.
    Instant(usize),
}

#[cfg(test)]
#[allow(clippy::unwrap_used)] // tests may unwrap: a panic is a failed test
mod tests {
    use super::*;

    fn run(d: &mut LineDecoder, text: &str) -> LineBatch {
        let mut out = LineBatch::default();
        d.feed(text.as_bytes(), &mut out);
        out
    }

    #[test]
    fn separators_comments_blank_and_crlf() {
        let mut d = LineDecoder::new(2);
        let out = run(&mut d, "# header\r\n1.5, -2\r\n\r\n  \n3 4\n5,6\n7 ,\t8\n");
        assert_eq!(out.values, vec![1.5, -2.0, 3.0, 4.0, 5.0, 6.0, 7.0, 8.0]);
        assert_eq!(
            out.events,
            vec![LineEvent::Run {
                first_sample: 0,
                values: 0..8
            }]
        );
        assert_eq!(d.stats().comments, 1);
        assert_eq!(d.stats().blank, 2);
        assert_eq!(d.stats().lines, 7);
    }

    #[test]
    fn bad_lines_break_the_run_with_their_line_number() {
        let mut d = LineDecoder::new(2);
        let out = run(&mut d, "1 2\n3\n4 x\n5,,6\n7 8\n");
        assert_eq!(out.values, vec![1.0, 2.0, 7.0, 8.0]);
        assert_eq!(
            out.events,
            vec![
                LineEvent::Run {
                    first_sample: 0,
                    values: 0..2
                },
                LineEvent::Rejected(LineError::WrongCount {
                    line: 2,
                    expected: 2,
                    found: 1
                }),
                LineEvent::Rejected(LineError::BadNumber {
                    line: 3,
                    field: 2,
                    text: "x".into()
                }),
                LineEvent::Rejected(LineError::EmptyField { line: 4, field: 2 }),
                LineEvent::Run {
                    first_sample: 4,
                    values: 2..4
                },
            ]
        );
        assert_eq!(d.stats().rejected_total(), 3);
    }

    #[test]
    fn too_many_values_are_counted() {
        let mut d = LineDecoder::new(2);
        let out = run(&mut d, "1 2 3 4\n");
        assert_eq!(
            out.errors().next(),
            Some(&LineError::WrongCount {
                line: 1,
                expected: 2,
                found: 4
            })
        );
    }

    #[test]
    fn not_utf8_names_the_byte() {
        let mut d = LineDecoder::new(1);
        let mut out = LineBatch::default();
        d.feed(b"12\xFF\n", &mut out);
        assert_eq!(
            out.errors().next(),
            Some(&LineError::NotUtf8 { line: 1, column: 3 })
        );
    }

    #[test]
    fn finish_takes_a_last_line_without_newline_and_reset_drops_it() {
        let mut d = LineDecoder::new(1);
        let mut out = run(&mut d, "1\n2");
        assert_eq!(out.values, vec![1.0]);
        d.finish(&mut out);
        assert_eq!(out.values, vec![2.0]);

        let out = run(&mut d, "3");
        assert!(out.values.is_empty());
        assert_eq!(d.reset(), 1);
        assert_eq!(d.stats().bytes_dropped, 1);
    }
}
