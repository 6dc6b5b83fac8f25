//! The BWF1 stream decoder: frames out of a byte stream (TCP, serial, a
//! file) pushed in arbitrary pieces. Check-then-parse on the header, a
//! size limit and the config's channel count and rate checked before any
//! body is awaited, and a resync to the next magic after a bad frame (see
//! the parent module for the layout).

use super::*;

/// Incremental decoder for a byte stream of frames (TCP, serial, a file).
///
/// Push bytes as they arrive, then call [`StreamDecoder::next_frame_into`]
/// until it returns `Ok(None)`. An `Err` reports one bad frame or one run of
/// junk; the decoder has already stepped past it, so keep calling.
#[derive(Debug)]
pub struct StreamDecoder {
    /// Pushed bytes; `buf[start..]` are not consumed yet.
    buf: Vec<u8>,
    /// First unconsumed byte in `buf`.
    start: usize,
    /// Stream offset of `buf[0]`, for error reports.
    base: u64,
    /// Frames announcing more bytes than this are refused from their header.
    max_frame_bytes: usize,
    /// After an error: looking for the next magic.
    scanning: bool,
    /// What the source's config says every header must announce.
    expect: Option<HeaderExpect>,
    stats: DecoderStats,
}

impl Default for StreamDecoder {
    fn default() -> Self {
        StreamDecoder::new()
    }
}

enum Step {
    /// Need more bytes.
    Wait,
    /// Found a good frame of this many bytes; samples at `HEADER_BYTES..`.
    Frame(Header, usize),
    /// A bad frame or junk at the current position.
    Bad(FrameError),
    /// Scanning: drop this many bytes; `true` if a magic follows them.
    Skip(usize, bool),
}

impl StreamDecoder {
    /// A decoder with [`DEFAULT_MAX_FRAME_BYTES`].
    pub fn new() -> StreamDecoder {
        StreamDecoder::with_max_frame_bytes(DEFAULT_MAX_FRAME_BYTES)
    }

    /// A decoder that refuses frames larger than `max_frame_bytes` (header,
    /// samples and CRC), so it never buffers more than that for one frame.
    pub fn with_max_frame_bytes(max_frame_bytes: usize) -> StreamDecoder {
        StreamDecoder {
            buf: Vec::new(),
            start: 0,
            base: 0,
            max_frame_bytes,
            scanning: false,
            expect: None,
            stats: DecoderStats::default(),
        }
    }

    /// Also refuse, from its 36 bytes, a header whose channel count or
    /// sample rate disagrees with `expect` (the source's config): counted
    /// like a bad header and resynchronised past, so no body is awaited
    /// on its word. `None`: any valid header is taken.
    pub fn set_expect(&mut self, expect: Option<HeaderExpect>) {
        self.expect = expect;
    }

    /// What headers are checked against, if anything.
    pub fn expect(&self) -> Option<HeaderExpect> {
        self.expect
    }

    /// The frame size limit.
    pub fn max_frame_bytes(&self) -> usize {
        self.max_frame_bytes
    }

    /// Appends bytes from the transport. Consumed bytes are compacted away
    /// first (amortised: only when they outweigh the rest), so the buffer
    /// stays within about twice the unconsumed bytes plus this push.
    pub fn push(&mut self, bytes: &[u8]) {
        self.stats.bytes_in += bytes.len() as u64;
        if self.start == self.buf.len() {
            self.base += self.start as u64;
            self.buf.clear();
            self.start = 0;
        } else if self.start > 0 && self.start >= self.buf.len() - self.start {
            self.base += self.start as u64;
            self.buf.drain(..self.start);
            self.start = 0;
        }
        self.buf.extend_from_slice(bytes);
    }

    /// The next frame, decoded into a new [`Samples`]. See
    /// [`StreamDecoder::next_frame_into`].
    ///
    /// # Errors
    /// As [`StreamDecoder::next_frame_into`].
    pub fn next_frame(&mut self) -> Result<Option<Frame>, FrameError> {
        let mut samples = Samples::default();
        Ok(self
            .next_frame_into(&mut samples)?
            .map(|header| Frame { header, samples }))
    }

    /// The next good frame's header, with its samples decoded into
    /// `samples` (reused: no allocation once it has grown to a frame's
    /// size). `Ok(None)`: no complete frame buffered, push more bytes.
    ///
    /// # Errors
    /// One bad frame or junk run, already counted and skipped: the decoder
    /// scans on for the next magic at the next call. `samples` is only
    /// changed when a good frame is returned.
    pub fn next_frame_into(&mut self, samples: &mut Samples) -> Result<Option<Header>, FrameError> {
        match self.next_frame_body()? {
            Some((header, body)) => {
                samples.decode_from(header.format, body);
                Ok(Some(header))
            }
            None => Ok(None),
        }
    }

    /// As [`StreamDecoder::next_frame_into`], without decoding: the next
    /// good frame's header and its sample section as wire bytes
    /// (`header.body_bytes()` of them, in `header.format`), borrowed from
    /// the decoder's buffer until the next call or push.
    ///
    /// # Errors
    /// As [`StreamDecoder::next_frame_into`].
    pub fn next_frame_body(&mut self) -> Result<Option<(Header, &[u8])>, FrameError> {
        loop {
            match self.step() {
                Step::Wait => return Ok(None),
                Step::Skip(n, found) => {
                    self.skip(n);
                    if found {
                        self.scanning = false;
                        self.stats.resyncs += 1;
                    } else {
                        return Ok(None);
                    }
                }
                Step::Bad(err) => {
                    self.stats.count(&err);
                    // Drop the first byte of the bad frame, then scan for the
                    // next magic: the rest of the frame may hold a good one
                    // if the bad part was its length.
                    self.skip(1);
                    self.scanning = true;
                    return Err(err);
                }
                Step::Frame(header, total) => {
                    let at = self.start;
                    self.start += total;
                    self.stats.frames += 1;
                    self.stats.frame_bytes += total as u64;
                    let body = &self.buf[at + HEADER_BYTES..at + total - CRC_BYTES];
                    return Ok(Some((header, body)));
                }
            }
        }
    }

    /// Ends the stream (EOF, or before a reconnect): drops what is buffered,
    /// counted in `bytes_skipped`, and starts offsets at 0 again. Stats are
    /// kept.
    ///
    /// # Errors
    /// [`FrameError::Truncated`] (counted) if a frame had begun and was not
    /// complete. Leftover junk after an already reported error is dropped
    /// without a second error.
    pub fn finish(&mut self) -> Result<(), FrameError> {
        let left = self.buffered();
        let result = if left > 0 && !self.scanning {
            let needed = if left >= HEADER_BYTES {
                Header::parse(&self.buf[self.start..], 0)
                    .map(|h| h.frame_bytes())
                    .unwrap_or(HEADER_BYTES as u64)
            } else {
                HEADER_BYTES as u64
            };
            let err = FrameError::Truncated {
                offset: self.stream_offset() + left as u64,
                needed,
                available: left as u64,
            };
            self.stats.count(&err);
            Err(err)
        } else {
            Ok(())
        };
        self.stats.bytes_skipped += left as u64;
        self.buf.clear();
        self.start = 0;
        self.base = 0;
        self.scanning = false;
        result
    }

    /// Counters so far.
    pub fn stats(&self) -> &DecoderStats {
        &self.stats
    }

    /// Bytes pushed and not yet consumed.
    pub fn buffered(&self) -> usize {
        self.buf.len() - self.start
    }

    /// Capacity of the internal buffer, in bytes (to check memory bounds).
    pub fn buffer_capacity(&self) -> usize {
        self.buf.capacity()
    }

    /// Stream offset of the next unconsumed byte.
    pub fn stream_offset(&self) -> u64 {
        self.base + self.start as u64
    }

    fn skip(&mut self, n: usize) {
        self.start += n;
        self.stats.bytes_skipped += n as u64;
    }

    /// Looks at the unconsumed bytes and says what to do; changes nothing.
    fn step(&self) -> Step {
        let avail = &self.buf[self.start..];
        let offset = self.stream_offset();
        if self.scanning {
            return match avail.windows(MAGIC.len()).position(|w| w == MAGIC) {
                Some(i) => Step::Skip(i, true),
                None => Step::Skip(avail.len() - magic_prefix_suffix(avail), false),
            };
        }
        // Refuse a wrong magic as soon as its first byte is there.
        let n = avail.len().min(MAGIC.len());
        if avail[..n] != MAGIC[..n] {
            return Step::Bad(FrameError::BadMagic { offset });
        }
        if avail.len() < HEADER_BYTES {
            return Step::Wait;
        }
        let header = match Header::parse(avail, offset) {
            Ok(h) => h,
            Err(e) => return Step::Bad(e),
        };
        if let Some(e) = &self.expect {
            if let Err(e) = e.check(&header, offset) {
                return Step::Bad(e);
            }
        }
        let total = header.frame_bytes();
        if total > self.max_frame_bytes as u64 {
            return Step::Bad(FrameError::TooLarge {
                offset,
                bytes: total,
                limit: self.max_frame_bytes as u64,
            });
        }
        // total <= max_frame_bytes, a usize.
        let total = total as usize;
        if avail.len() < total {
            return Step::Wait;
        }
        match checked_frame(&avail[..total], &header, offset) {
            Ok(_) => Step::Frame(header, total),
            Err(e) => Step::Bad(e),
        }
    }
}

/// Length of the longest suffix of `bytes` that is a proper prefix of the
/// magic (0..=3): those bytes may begin a frame once more arrive.
pub(super) fn magic_prefix_suffix(bytes: &[u8]) -> usize {
    (1..MAGIC.len())
        .rev()
        .find(|&k| bytes.len() >= k && bytes[bytes.len() - k..] == MAGIC[..k])
        .unwrap_or(0)
}
