//! BWF1: the project's binary frame. A 36-byte header, `S·C` samples
//! interleaved by instant, then a CRC-32 over everything before it.
//!
//! ```text
//! offset  bytes  field
//!      0      4  magic "BWF1"
//!      4      1  version (1)
//!      5      1  sample format code (see SampleFormat::code)
//!      6      2  channels C, 1..=1024              (u16 LE)
//!      8      4  samples per channel S, 1..=65536  (u32 LE)
//!     12      8  first_sample                      (u64 LE)
//!     20      8  timestamp_ns, 0 = unknown         (u64 LE)
//!     28      8  sample_rate_hz, finite, > 0       (f64 LE)
//!     36  S·C·w  samples
//!    end      4  CRC-32/IEEE (crc32fast) over bytes 0..end (u32 LE)
//! ```
//!
//! Decoding is check-then-parse. The [`StreamDecoder`] validates a header
//! as soon as its 36 bytes are there, and refuses a frame larger than its
//! `max_frame_bytes` before it waits for (or buffers) the body: so a header
//! announcing half a gigabyte costs nothing. Given the source's config
//! ([`HeaderExpect`]), it also refuses a header whose channel count or
//! sample rate disagrees, from the header alone: a plausible-looking header
//! never makes it wait for a body. After a bad header or a bad CRC
//! it drops one byte and scans for the next magic (a resync). It never
//! reserves memory on the word of a header; its buffer only holds bytes
//! that were pushed and not yet consumed.

mod stream;

#[cfg(test)]
use stream::magic_prefix_suffix;
pub use stream::StreamDecoder;

use super::{encode_samples, EncodeError, SampleFormat, SampleSlice, Samples};

/// The four bytes every frame starts with.
pub const MAGIC: [u8; 4] = *b"BWF1";
/// The one version this decoder speaks.
pub const VERSION: u8 = 1;
/// Bytes before the samples.
pub const HEADER_BYTES: usize = 36;
/// Bytes of the trailing CRC.
pub const CRC_BYTES: usize = 4;
/// Largest channel count a header may announce.
pub const MAX_CHANNELS: u16 = 1024;
/// Largest samples-per-channel a header may announce.
pub const MAX_SAMPLES_PER_CHANNEL: u32 = 65536;
/// Default limit on one frame's size for a stream decoder: 16 MiB, about
/// 5 s of 16 channels of i32 at 51.2 kHz. Larger frames are refused.
pub const DEFAULT_MAX_FRAME_BYTES: usize = 16 << 20;

// Field offsets inside the header, for error reports.
const OFF_VERSION: u64 = 4;
const OFF_FORMAT: u64 = 5;
const OFF_CHANNELS: u64 = 6;
const OFF_SAMPLES: u64 = 8;
const OFF_FIRST_SAMPLE: u64 = 12;
const OFF_TIMESTAMP: u64 = 20;
const OFF_RATE: u64 = 28;

/// A frame's header fields, as on the wire.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Header {
    /// Always [`VERSION`] for frames this module accepts or writes.
    pub version: u8,
    /// How each sample is stored.
    pub format: SampleFormat,
    /// Channels per instant, C (1..=1024).
    pub channels: u16,
    /// Instants in this frame, S (1..=65536).
    pub samples_per_channel: u32,
    /// Stream index of this frame's first instant; the next frame should
    /// start at `first_sample + samples_per_channel`.
    pub first_sample: u64,
    /// Time of the first instant, ns since the Unix epoch; 0 = unknown (the
    /// receiver stamps on arrival).
    pub timestamp_ns: u64,
    /// Sampling rate of every channel in the frame.
    pub sample_rate_hz: f64,
}

impl Header {
    /// A version-1 header.
    pub fn new(
        format: SampleFormat,
        channels: u16,
        samples_per_channel: u32,
        first_sample: u64,
        timestamp_ns: u64,
        sample_rate_hz: f64,
    ) -> Header {
        Header {
            version: VERSION,
            format,
            channels,
            samples_per_channel,
            first_sample,
            timestamp_ns,
            sample_rate_hz,
        }
    }

    /// Samples in the frame, all channels: C·S.
    pub fn sample_count(&self) -> u64 {
        u64::from(self.channels) * u64::from(self.samples_per_channel)
    }

    /// Bytes of the sample section: C·S·width.
    pub fn body_bytes(&self) -> u64 {
        self.sample_count() * self.format.width() as u64
    }

    /// Bytes of the whole frame: header, samples and CRC.
    pub fn frame_bytes(&self) -> u64 {
        HEADER_BYTES as u64 + self.body_bytes() + CRC_BYTES as u64
    }

    /// Checks every field against the spec; `offset` is the stream offset
    /// of the frame's first byte, used in the error.
    ///
    /// # Errors
    /// The first field out of range, in wire order.
    pub fn validate(&self, offset: u64) -> Result<(), FrameError> {
        if self.version != VERSION {
            return Err(FrameError::UnsupportedVersion {
                offset: offset + OFF_VERSION,
                version: self.version,
            });
        }
        if !(1..=MAX_CHANNELS).contains(&self.channels) {
            return Err(FrameError::BadChannelCount {
                offset: offset + OFF_CHANNELS,
                count: self.channels,
            });
        }
        if !(1..=MAX_SAMPLES_PER_CHANNEL).contains(&self.samples_per_channel) {
            return Err(FrameError::BadSampleCount {
                offset: offset + OFF_SAMPLES,
                count: self.samples_per_channel,
            });
        }
        if !(self.sample_rate_hz.is_finite() && self.sample_rate_hz > 0.0) {
            return Err(FrameError::BadSampleRate {
                offset: offset + OFF_RATE,
                rate: self.sample_rate_hz,
            });
        }
        Ok(())
    }

    /// Reads and validates a header from the first [`HEADER_BYTES`] of
    /// `bytes`. `offset` is the stream offset of `bytes[0]`.
    ///
    /// # Errors
    /// [`FrameError::Truncated`] if fewer than 36 bytes are given, else the
    /// first bad field in wire order (magic, version, format, channels,
    /// samples, rate), with its own offset.
    pub fn parse(bytes: &[u8], offset: u64) -> Result<Header, FrameError> {
        let Some(h) = bytes.get(..HEADER_BYTES) else {
            return Err(FrameError::Truncated {
                offset: offset + bytes.len() as u64,
                needed: HEADER_BYTES as u64,
                available: bytes.len() as u64,
            });
        };
        if h[0..4] != MAGIC {
            return Err(FrameError::BadMagic { offset });
        }
        let version = h[4];
        if version != VERSION {
            return Err(FrameError::UnsupportedVersion {
                offset: offset + OFF_VERSION,
                version,
            });
        }
        let Some(format) = SampleFormat::from_code(h[5]) else {
            return Err(FrameError::BadFormat {
                offset: offset + OFF_FORMAT,
                code: h[5],
            });
        };
        let header = Header {
            version,
            format,
            channels: u16::from_le_bytes([h[6], h[7]]),
            samples_per_channel: u32::from_le_bytes([h[8], h[9], h[10], h[11]]),
            first_sample: u64::from_le_bytes([
                h[12], h[13], h[14], h[15], h[16], h[17], h[18], h[19],
            ]),
            timestamp_ns: u64::from_le_bytes([
                h[20], h[21], h[22], h[23], h[24], h[25], h[26], h[27],
            ]),
            sample_rate_hz: f64::from_le_bytes([
                h[28], h[29], h[30], h[31], h[32], h[33], h[34], h[35],
            ]),
        };
        header.validate(offset)?;
        Ok(header)
    }

    /// Appends the 36 header bytes to `out` (no validation).
    pub fn write_to(&self, out: &mut Vec<u8>) {
        out.extend_from_slice(&MAGIC);
        out.push(self.version);
        out.push(self.format.code());
        out.extend_from_slice(&self.channels.to_le_bytes());
        out.extend_from_slice(&self.samples_per_channel.to_le_bytes());
        out.extend_from_slice(&self.first_sample.to_le_bytes());
        out.extend_from_slice(&self.timestamp_ns.to_le_bytes());
        out.extend_from_slice(&self.sample_rate_hz.to_le_bytes());
    }
}

/// One decoded frame.
#[derive(Debug, Clone, PartialEq)]
pub struct Frame {
    pub header: Header,
    /// `channels · samples_per_channel` samples, interleaved by instant.
    pub samples: Samples,
}

/// What was wrong with a frame. Offsets count bytes from the start of the
/// stream (stream decoder, since its creation or last [`StreamDecoder::finish`])
/// or of the datagram.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum FrameError {
    /// `offset`: where a frame was expected to start.
    #[error("byte {offset}: bad magic, expected \"BWF1\"")]
    BadMagic { offset: u64 },
    /// `offset`: of the version byte.
    #[error("byte {offset}: version {version} is not supported (only 1)")]
    UnsupportedVersion { offset: u64, version: u8 },
    /// `offset`: of the format byte.
    #[error("byte {offset}: sample format code {code} is unknown (1..=5)")]
    BadFormat { offset: u64, code: u8 },
    /// `offset`: of the channel count field.
    #[error("byte {offset}: channel count {count} is outside 1..=1024")]
    BadChannelCount { offset: u64, count: u16 },
    /// `offset`: of the samples-per-channel field.
    #[error("byte {offset}: samples per channel {count} is outside 1..=65536")]
    BadSampleCount { offset: u64, count: u32 },
    /// `offset`: of the sample rate field.
    #[error("byte {offset}: sample rate {rate} Hz is not a finite number > 0")]
    BadSampleRate { offset: u64, rate: f64 },
    /// `offset`: of the frame start; `bytes` is the announced frame size.
    #[error("byte {offset}: frame of {bytes} bytes exceeds the limit of {limit} bytes")]
    TooLarge { offset: u64, bytes: u64, limit: u64 },
    /// `offset`: of the frame start; `expected` is the CRC stored in the
    /// frame, `actual` the CRC computed over its bytes.
    #[error("byte {offset}: CRC mismatch, frame says {expected:#010x}, bytes give {actual:#010x}")]
    CrcMismatch {
        offset: u64,
        expected: u32,
        actual: u32,
    },
    /// `offset`: where the input ended; `needed` bytes were required from
    /// the frame start, `available` were there.
    #[error("byte {offset}: input ends inside a frame ({available} of {needed} bytes)")]
    Truncated {
        offset: u64,
        needed: u64,
        available: u64,
    },
    /// `offset`: of the first byte after the frame (datagrams only).
    #[error("byte {offset}: {extra} bytes after the end of the frame")]
    TrailingBytes { offset: u64, extra: u64 },
    /// `offset`: of the channel count field; the header is valid but
    /// announces `count` channels where the source's config says `expected`.
    #[error("byte {offset}: frame has {count} channels, the config says {expected}")]
    ChannelCountMismatch {
        offset: u64,
        count: u16,
        expected: u16,
    },
    /// `offset`: of the sample rate field; the header is valid but
    /// announces `rate` Hz where the source's config says `expected`.
    #[error("byte {offset}: frame says {rate} Hz, the config says {expected} Hz")]
    SampleRateMismatch {
        offset: u64,
        rate: f64,
        expected: f64,
    },
}

/// What a source's config says every header must announce: a decoder given
/// one refuses a header that disagrees from its 36 bytes, before it waits
/// for the body (README, "Wire format BWF1").
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct HeaderExpect {
    /// Channels in one instant.
    pub channels: u16,
    /// Samples per second per channel; a header within a relative 1e-6 of
    /// it agrees.
    pub sample_rate_hz: f64,
}

impl HeaderExpect {
    /// Checks a parsed header against the config; `offset` is the stream
    /// offset of the frame's first byte, used in the error.
    ///
    /// # Errors
    /// [`FrameError::ChannelCountMismatch`], then
    /// [`FrameError::SampleRateMismatch`], with the field's own offset.
    pub fn check(&self, h: &Header, offset: u64) -> Result<(), FrameError> {
        if h.channels != self.channels {
            return Err(FrameError::ChannelCountMismatch {
                offset: offset + OFF_CHANNELS,
                count: h.channels,
                expected: self.channels,
            });
        }
        if (h.sample_rate_hz - self.sample_rate_hz).abs() > 1e-6 * self.sample_rate_hz {
            return Err(FrameError::SampleRateMismatch {
                offset: offset + OFF_RATE,
                rate: h.sample_rate_hz,
                expected: self.sample_rate_hz,
            });
        }
        Ok(())
    }
}

/// The kind of a [`FrameError`], for counting and metric labels.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum RejectReason {
    BadMagic,
    UnsupportedVersion,
    BadFormat,
    BadChannelCount,
    BadSampleCount,
    BadSampleRate,
    TooLarge,
    CrcMismatch,
    Truncated,
    TrailingBytes,
    ChannelCountMismatch,
    SampleRateMismatch,
}

impl RejectReason {
    pub const ALL: [RejectReason; 12] = [
        RejectReason::BadMagic,
        RejectReason::UnsupportedVersion,
        RejectReason::BadFormat,
        RejectReason::BadChannelCount,
        RejectReason::BadSampleCount,
        RejectReason::BadSampleRate,
        RejectReason::TooLarge,
        RejectReason::CrcMismatch,
        RejectReason::Truncated,
        RejectReason::TrailingBytes,
        RejectReason::ChannelCountMismatch,
        RejectReason::SampleRateMismatch,
    ];

    /// Snake-case name, usable as a metric label value.
    pub const fn as_str(self) -> &'static str {
        match self {
            RejectReason::BadMagic => "bad_magic",
            RejectReason::UnsupportedVersion => "unsupported_version",
            RejectReason::BadFormat => "bad_format",
            RejectReason::BadChannelCount => "bad_channel_count",
            RejectReason::BadSampleCount => "bad_sample_count",
            RejectReason::BadSampleRate => "bad_sample_rate",
            RejectReason::TooLarge => "too_large",
            RejectReason::CrcMismatch => "crc_mismatch",
            RejectReason::Truncated => "truncated",
            RejectReason::TrailingBytes => "trailing_bytes",
            RejectReason::ChannelCountMismatch => "channel_count_mismatch",
            RejectReason::SampleRateMismatch => "sample_rate_mismatch",
        }
    }
}

impl FrameError {
    pub fn reason(&self) -> RejectReason {
        match self {
            FrameError::BadMagic { .. } => RejectReason::BadMagic,
            FrameError::UnsupportedVersion { .. } => RejectReason::UnsupportedVersion,
            FrameError::BadFormat { .. } => RejectReason::BadFormat,
            FrameError::BadChannelCount { .. } => RejectReason::BadChannelCount,
            FrameError::BadSampleCount { .. } => RejectReason::BadSampleCount,
            FrameError::BadSampleRate { .. } => RejectReason::BadSampleRate,
            FrameError::TooLarge { .. } => RejectReason::TooLarge,
            FrameError::CrcMismatch { .. } => RejectReason::CrcMismatch,
            FrameError::Truncated { .. } => RejectReason::Truncated,
            FrameError::TrailingBytes { .. } => RejectReason::TrailingBytes,
            FrameError::ChannelCountMismatch { .. } => RejectReason::ChannelCountMismatch,
            FrameError::SampleRateMismatch { .. } => RejectReason::SampleRateMismatch,
        }
    }

    /// The byte offset the error names.
    pub fn offset(&self) -> u64 {
        match *self {
            FrameError::BadMagic { offset }
            | FrameError::UnsupportedVersion { offset, .. }
            | FrameError::BadFormat { offset, .. }
            | FrameError::BadChannelCount { offset, .. }
            | FrameError::BadSampleCount { offset, .. }
            | FrameError::BadSampleRate { offset, .. }
            | FrameError::TooLarge { offset, .. }
            | FrameError::CrcMismatch { offset, .. }
            | FrameError::Truncated { offset, .. }
            | FrameError::TrailingBytes { offset, .. }
            | FrameError::ChannelCountMismatch { offset, .. }
            | FrameError::SampleRateMismatch { offset, .. } => offset,
        }
    }
}

/// Counters of one decoder, for metrics. Monotonic, never reset.
#[derive(Debug, Clone, Default, PartialEq, Eq)]
pub struct DecoderStats {
    /// Bytes handed to the decoder.
    pub bytes_in: u64,
    /// Good frames returned.
    pub frames: u64,
    /// Bytes of the good frames (header, samples, CRC).
    pub frame_bytes: u64,
    /// Frames whose CRC did not match (also in `rejected(CrcMismatch)`).
    pub crc_errors: u64,
    /// Times a scan after an error found the next magic.
    pub resyncs: u64,
    /// Bytes dropped: bad frames, junk between frames, a partial frame at
    /// the end of a stream. For a stream decoder,
    /// `bytes_in == frame_bytes + bytes_skipped + buffered()`.
    pub bytes_skipped: u64,
    rejected: [u64; RejectReason::ALL.len()],
}

impl DecoderStats {
    /// Frames (or stretches of input) rejected for `reason`.
    pub fn rejected(&self, reason: RejectReason) -> u64 {
        self.rejected[reason as usize]
    }

    /// All rejections, every reason.
    pub fn rejected_total(&self) -> u64 {
        self.rejected.iter().sum()
    }

    fn count(&mut self, err: &FrameError) {
        self.rejected[err.reason() as usize] += 1;
        if err.reason() == RejectReason::CrcMismatch {
            self.crc_errors += 1;
        }
    }
}

/// Appends one frame to `out`.
///
/// `samples` must hold `channels · samples_per_channel` values interleaved
/// by instant, in the type that matches `header.format` (`I32` for i24).
///
/// # Errors
/// An invalid header ([`EncodeError::Header`]), a wrong sample count or
/// type, an i24 value out of range. On error `out` is left as it was.
pub fn encode_into(
    header: &Header,
    samples: SampleSlice<'_>,
    out: &mut Vec<u8>,
) -> Result<(), EncodeError> {
    header.validate(0).map_err(EncodeError::Header)?;
    if samples.len() as u64 != header.sample_count() {
        return Err(EncodeError::CountMismatch {
            expected: header.sample_count(),
            given: samples.len(),
        });
    }
    let start = out.len();
    // Size is known and checked; usize holds it on 32- and 64-bit targets
    // (at most 512 MiB + 40).
    out.reserve(header.frame_bytes() as usize);
    header.write_to(out);
    if let Err(e) = encode_samples(header.format, samples, out) {
        out.truncate(start);
        return Err(e);
    }
    let crc = crc32fast::hash(&out[start..]);
    out.extend_from_slice(&crc.to_le_bytes());
    Ok(())
}

/// A frame of `given` bytes holds exactly the frame `header` announces.
fn check_whole(header: &Header, given: usize) -> Result<(), FrameError> {
    let needed = header.frame_bytes();
    let given = given as u64;
    if given < needed {
        return Err(FrameError::Truncated {
            offset: given,
            needed,
            available: given,
        });
    }
    if given > needed {
        return Err(FrameError::TrailingBytes {
            offset: needed,
            extra: given - needed,
        });
    }
    Ok(())
}

/// Rewrites the stream position, timestamp and sample rate of the encoded
/// frame `frame` in place and recomputes its CRC: the frame [`encode_into`]
/// writes for the same header and samples. The samples are kept as they
/// are; the old CRC is not checked. Returns the new header.
///
/// # Errors
/// The frame's header as [`Header::parse`] finds it;
/// [`FrameError::Truncated`] or [`FrameError::TrailingBytes`] when `frame`
/// is not exactly the frame its header announces;
/// [`FrameError::BadSampleRate`] for a rate that is not finite and > 0.
/// On error `frame` is left as it was.
pub fn restamp(
    frame: &mut [u8],
    first_sample: u64,
    timestamp_ns: u64,
    sample_rate_hz: f64,
) -> Result<Header, FrameError> {
    let mut header = Header::parse(frame, 0)?;
    check_whole(&header, frame.len())?;
    header.first_sample = first_sample;
    header.timestamp_ns = timestamp_ns;
    header.sample_rate_hz = sample_rate_hz;
    header.validate(0)?;
    let put = |frame: &mut [u8], at: u64, bytes: [u8; 8]| {
        let at = at as usize;
        frame[at..at + 8].copy_from_slice(&bytes);
    };
    put(frame, OFF_FIRST_SAMPLE, first_sample.to_le_bytes());
    put(frame, OFF_TIMESTAMP, timestamp_ns.to_le_bytes());
    put(frame, OFF_RATE, sample_rate_hz.to_le_bytes());
    let end = frame.len() - CRC_BYTES;
    let crc = crc32fast::hash(&frame[..end]);
    frame[end..].copy_from_slice(&crc.to_le_bytes());
    Ok(header)
}

/// One frame as a new vector. See [`encode_into`].
///
/// # Errors
/// As [`encode_into`].
pub fn encode(header: &Header, samples: SampleSlice<'_>) -> Result<Vec<u8>, EncodeError> {
    let mut out = Vec::new();
    encode_into(header, samples, &mut out)?;
    Ok(out)
}

/// Decodes a datagram that must hold exactly one frame.
///
/// # Errors
/// Any header error; [`FrameError::Truncated`] if the datagram is shorter
/// than the frame it announces, [`FrameError::TrailingBytes`] if longer,
/// [`FrameError::CrcMismatch`]. Offsets are from the datagram's start.
pub fn decode_datagram(datagram: &[u8]) -> Result<Frame, FrameError> {
    let mut samples = Samples::default();
    let header = decode_datagram_into(datagram, &mut samples)?;
    Ok(Frame { header, samples })
}

/// As [`decode_datagram`], decoding the samples into a reused buffer.
/// `samples` is only changed when the frame is good.
///
/// # Errors
/// As [`decode_datagram`].
pub fn decode_datagram_into(datagram: &[u8], samples: &mut Samples) -> Result<Header, FrameError> {
    let (header, body) = decode_datagram_body(datagram)?;
    samples.decode_from(header.format, body);
    Ok(header)
}

/// As [`decode_datagram`], without decoding the samples: the header and
/// the sample section as wire bytes (`header.body_bytes()` of them, in
/// `header.format`), for a reader that scales straight from the bytes.
///
/// # Errors
/// As [`decode_datagram`].
pub fn decode_datagram_body(datagram: &[u8]) -> Result<(Header, &[u8]), FrameError> {
    decode_datagram_checked(datagram, None)
}

/// As [`decode_datagram_body`], refusing a header that disagrees with
/// `expect` before anything else is looked at.
///
/// # Errors
/// As [`decode_datagram`], and [`FrameError::ChannelCountMismatch`] or
/// [`FrameError::SampleRateMismatch`].
pub fn decode_datagram_expecting<'a>(
    datagram: &'a [u8],
    expect: &HeaderExpect,
) -> Result<(Header, &'a [u8]), FrameError> {
    decode_datagram_checked(datagram, Some(expect))
}

fn decode_datagram_checked<'a>(
    datagram: &'a [u8],
    expect: Option<&HeaderExpect>,
) -> Result<(Header, &'a [u8]), FrameError> {
    let n = datagram.len().min(MAGIC.len());
    if datagram[..n] != MAGIC[..n] {
        return Err(FrameError::BadMagic { offset: 0 });
    }
    let header = Header::parse(datagram, 0)?;
    if let Some(e) = expect {
        e.check(&header, 0)?;
    }
    check_whole(&header, datagram.len())?;
    let body = checked_frame(datagram, &header, 0)?;
    Ok((header, body))
}

/// Checks the CRC of a complete frame (`bytes.len() == frame_bytes`) and
/// returns its sample section.
fn checked_frame<'a>(
    bytes: &'a [u8],
    header: &Header,
    offset: u64,
) -> Result<&'a [u8], FrameError> {
    let crc_at = bytes.len() - CRC_BYTES;
    let (covered, tail) = bytes.split_at(crc_at);
    let expected = u32::from_le_bytes([tail[0], tail[1], tail[2], tail[3]]);
    let actual = crc32fast::hash(covered);
    if expected != actual {
        return Err(FrameError::CrcMismatch {
            offset,
            expected,
            actual,
        });
    }
    debug_assert_eq!(bytes.len() as u64, header.frame_bytes());
    Ok(&covered[HEADER_BYTES..])
}

/// A datagram decoder that keeps [`DecoderStats`] (UDP sources).
#[derive(Debug, Default)]
pub struct DatagramDecoder {
    stats: DecoderStats,
    expect: Option<HeaderExpect>,
}

impl DatagramDecoder {
    pub fn new() -> DatagramDecoder {
        DatagramDecoder::default()
    }

    /// A decoder that also refuses a frame whose header disagrees with
    /// `expect` (counted like any other bad datagram, before its CRC is
    /// computed).
    pub fn expecting(expect: HeaderExpect) -> DatagramDecoder {
        DatagramDecoder {
            stats: DecoderStats::default(),
            expect: Some(expect),
        }
    }

    /// Decodes one datagram into `samples`, counting the outcome. A bad
    /// datagram counts whole in `bytes_skipped`.
    ///
    /// # Errors
    /// As [`decode_datagram`].
    pub fn decode(&mut self, datagram: &[u8], samples: &mut Samples) -> Result<Header, FrameError> {
        let (header, body) = self.decode_body(datagram)?;
        samples.decode_from(header.format, body);
        Ok(header)
    }

    /// As [`DatagramDecoder::decode`], returning the sample section as
    /// wire bytes (see [`decode_datagram_body`]).
    ///
    /// # Errors
    /// As [`decode_datagram`].
    pub fn decode_body<'a>(
        &mut self,
        datagram: &'a [u8],
    ) -> Result<(Header, &'a [u8]), FrameError> {
        let len = datagram.len() as u64;
        self.stats.bytes_in += len;
        let decoded = match self.expect {
            None => decode_datagram_body(datagram),
            Some(e) => decode_datagram_expecting(datagram, &e),
        };
        match decoded {
            Ok(h) => {
                self.stats.frames += 1;
                self.stats.frame_bytes += len;
                Ok(h)
            }
            Err(e) => {
                self.stats.count(&e);
                self.stats.bytes_skipped += len;
                Err(e)
            }
        }
    }

    pub fn stats(&self) -> &DecoderStats {
        &self.stats
    }
}

#[cfg(test)]
#[allow(clippy::unwrap_used)] // tests may unwrap: a panic is a failed test
mod tests {
    use super::*;

    fn frame_i16(first: u64, values: &[i16], channels: u16) -> Vec<u8> {
        let s = (values.len() / channels as usize) as u32;
        let h = Header::new(SampleFormat::I16, channels, s, first, 0, 25_600.0);
        encode(&h, SampleSlice::I16(values)).unwrap()
    }

    #[test]
    fn layout_matches_the_spec_table() {
        let h = Header::new(SampleFormat::I16, 2, 1, 0x0102, 0x0304, 1.0);
        let f = encode(&h, SampleSlice::I16(&[-1, 2])).unwrap();
        assert_eq!(f.len(), 36 + 4 + 4);
        assert_eq!(&f[0..4], &[0x42, 0x57, 0x46, 0x31]);
        assert_eq!(f[4], 1);
        assert_eq!(f[5], 1);
        assert_eq!(&f[6..8], &[2, 0]);
        assert_eq!(&f[8..12], &[1, 0, 0, 0]);
        assert_eq!(&f[12..14], &[0x02, 0x01]);
        assert_eq!(&f[20..22], &[0x04, 0x03]);
        assert_eq!(&f[28..36], &1.0f64.to_le_bytes());
        assert_eq!(&f[36..40], &[0xFF, 0xFF, 2, 0]);
        assert_eq!(&f[40..44], &crc32fast::hash(&f[..40]).to_le_bytes());
    }

    #[test]
    fn restamp_gives_the_frame_encode_writes() {
        // Restamping must give, byte for byte, the frame encode_into writes
        // for the new header and the same samples (CRC included), in every
        // sample format.
        let cases: [(SampleFormat, SampleSlice<'_>); 4] = [
            (SampleFormat::I16, SampleSlice::I16(&[-3, 7, 1000, -1000])),
            (
                SampleFormat::I24,
                SampleSlice::I32(&[-8_388_608, 5, 8_388_607, 0]),
            ),
            (
                SampleFormat::F32,
                SampleSlice::F32(&[0.5, -1.25, 3.0, 1e-3]),
            ),
            (
                SampleFormat::F64,
                SampleSlice::F64(&[0.5, -1.25, 3.0, 1e-3]),
            ),
        ];
        for (format, samples) in cases {
            let old = Header::new(format, 2, 2, 0, 0, 25_600.0);
            let new = Header::new(
                format,
                2,
                2,
                123_456_789,
                1_700_000_000_000_000_000,
                51_200.0,
            );
            let mut frame = Vec::new();
            encode_into(&old, samples, &mut frame).unwrap();
            let mut want = Vec::new();
            encode_into(&new, samples, &mut want).unwrap();
            let h = restamp(&mut frame, 123_456_789, 1_700_000_000_000_000_000, 51_200.0).unwrap();
            assert_eq!(h, new, "{format:?}");
            assert_eq!(frame, want, "{format:?}");
            assert_eq!(decode_datagram(&frame).unwrap().header, new);
        }
    }

    #[test]
    fn restamp_refuses_a_frame_of_the_wrong_length_or_a_bad_rate() {
        let h = Header::new(SampleFormat::I16, 1, 2, 0, 0, 25_600.0);
        let good = encode(&h, SampleSlice::I16(&[1, 2])).unwrap();
        let mut short = good[..good.len() - 1].to_vec();
        assert_eq!(
            restamp(&mut short, 5, 0, 25_600.0),
            Err(FrameError::Truncated {
                offset: 43,
                needed: 44,
                available: 43
            })
        );
        assert_eq!(short, good[..good.len() - 1]);
        let mut long = good.clone();
        long.push(0);
        assert_eq!(
            restamp(&mut long, 5, 0, 25_600.0),
            Err(FrameError::TrailingBytes {
                offset: 44,
                extra: 1
            })
        );
        let mut frame = good.clone();
        assert_eq!(
            restamp(&mut frame, 5, 0, f64::NAN).map_err(|e| e.reason()),
            Err(RejectReason::BadSampleRate)
        );
        assert_eq!(frame, good, "left as it was");
        let mut junk = vec![0u8; 44];
        assert_eq!(
            restamp(&mut junk, 5, 0, 25_600.0),
            Err(FrameError::BadMagic { offset: 0 })
        );
    }

    #[test]
    fn magic_prefix_suffix_finds_partial_magics() {
        assert_eq!(magic_prefix_suffix(b""), 0);
        assert_eq!(magic_prefix_suffix(b"xxB"), 1);
        assert_eq!(magic_prefix_suffix(b"xBW"), 2);
        assert_eq!(magic_prefix_suffix(b"BWF"), 3);
        assert_eq!(magic_prefix_suffix(b"BWFx"), 0);
    }

    #[test]
    fn wrong_magic_is_refused_from_its_first_byte() {
        let mut d = StreamDecoder::new();
        d.push(b"X");
        assert_eq!(d.next_frame(), Err(FrameError::BadMagic { offset: 0 }));
        assert_eq!(d.next_frame(), Ok(None));
        assert_eq!(d.stats().bytes_skipped, 1);
    }

    #[test]
    fn junk_before_the_first_frame_is_skipped_and_counted() {
        let f = frame_i16(5, &[1, 2, 3, 4], 2);
        let mut d = StreamDecoder::new();
        d.push(b"noise");
        d.push(&f);
        assert_eq!(d.next_frame(), Err(FrameError::BadMagic { offset: 0 }));
        let got = d.next_frame().unwrap().unwrap();
        assert_eq!(got.header.first_sample, 5);
        assert_eq!(d.stats().resyncs, 1);
        assert_eq!(d.stats().bytes_skipped, 5);
        assert_eq!(d.next_frame(), Ok(None));
    }

    #[test]
    fn finish_reports_a_partial_frame() {
        let f = frame_i16(0, &[1, 2], 1);
        let mut d = StreamDecoder::new();
        d.push(&f[..40]);
        assert_eq!(d.next_frame(), Ok(None));
        assert_eq!(
            d.finish(),
            Err(FrameError::Truncated {
                offset: 40,
                needed: f.len() as u64,
                available: 40
            })
        );
        assert_eq!(d.stats().bytes_skipped, 40);
        assert_eq!(d.stream_offset(), 0);
        d.push(&f);
        assert!(d.next_frame().unwrap().is_some());
    }

    #[test]
    fn datagram_trailing_and_short() {
        let f = frame_i16(0, &[1, 2], 1);
        let mut long = f.clone();
        long.push(0);
        assert_eq!(
            decode_datagram(&long),
            Err(FrameError::TrailingBytes {
                offset: f.len() as u64,
                extra: 1
            })
        );
        assert_eq!(
            decode_datagram(&f[..f.len() - 1]),
            Err(FrameError::Truncated {
                offset: f.len() as u64 - 1,
                needed: f.len() as u64,
                available: f.len() as u64 - 1
            })
        );
        assert!(matches!(
            decode_datagram(&f[..10]),
            Err(FrameError::Truncated { offset: 10, .. })
        ));
        assert_eq!(
            decode_datagram(b""),
            Err(FrameError::Truncated {
                offset: 0,
                needed: 36,
                available: 0
            })
        );
    }

    /// A header that disagrees with the config is refused from its 36
    /// bytes alone (no body pushed), and the next frame is found at once.
    #[test]
    fn a_header_that_disagrees_with_the_config_is_refused_before_its_body() {
        let expect = HeaderExpect {
            channels: 4,
            sample_rate_hz: 25_600.0,
        };
        let good = frame_i16(7, &[1; 8], 4);
        for (bad, want) in [
            (
                Header::new(SampleFormat::F32, 63, 65_536, 0, 0, 25_600.0),
                FrameError::ChannelCountMismatch {
                    offset: 6,
                    count: 63,
                    expected: 4,
                },
            ),
            (
                Header::new(SampleFormat::F32, 4, 65_536, 0, 0, 48_000.0),
                FrameError::SampleRateMismatch {
                    offset: 28,
                    rate: 48_000.0,
                    expected: 25_600.0,
                },
            ),
        ] {
            let mut d = StreamDecoder::new();
            d.set_expect(Some(expect));
            let mut bytes = Vec::new();
            bad.write_to(&mut bytes);
            d.push(&bytes);
            assert_eq!(d.next_frame(), Err(want.clone()));
            d.push(&good);
            assert_eq!(d.next_frame().unwrap().unwrap().header.first_sample, 7);
            assert_eq!(d.stats().resyncs, 1);
            assert_eq!(d.stats().bytes_skipped, 36);
            assert_eq!(d.stats().rejected(want.reason()), 1);
            // Without the config the same header waits for its body.
            let mut d = StreamDecoder::new();
            d.push(&bytes);
            d.push(&good);
            assert_eq!(d.next_frame(), Ok(None));
        }
        // A datagram decoder given the config refuses the frame whole.
        let two = frame_i16(0, &[1; 4], 2);
        let mut d = DatagramDecoder::expecting(expect);
        assert!(matches!(
            d.decode_body(&two),
            Err(FrameError::ChannelCountMismatch { count: 2, .. })
        ));
        assert_eq!(d.stats().bytes_skipped, two.len() as u64);
        assert!(d.decode_body(&good).is_ok());
    }
}
