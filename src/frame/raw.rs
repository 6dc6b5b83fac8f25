//! `raw`: headerless samples, interleaved by instant, in a format and with a
//! channel count fixed by the config.
//!
//! There is nothing to validate and nothing to resync on: the decoder only
//! cuts the byte stream into whole instants, keeping a partial instant (at
//! most `C·w − 1` bytes) across feeds. A stream joined in the middle of an
//! instant stays misaligned; that is the framing's limit, so sources should
//! start it at a known boundary (a fresh connection) and call
//! [`RawDecoder::reset`] when the transport breaks.

use super::{SampleFormat, Samples};

/// Largest channel count, as for BWF1.
pub const MAX_CHANNELS: usize = 1024;

#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
pub enum RawError {
    #[error("channels = {channels} is outside 1..=1024")]
    BadChannelCount { channels: usize },
}

/// Where one feed's instants sit in the stream.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct RawBatch {
    /// Index of the batch's first instant since the decoder was made.
    pub first_sample: u64,
    /// Complete instants decoded by this feed.
    pub instants: usize,
}

/// Counters of one raw decoder. Monotonic.
#[derive(Debug, Clone, Default, PartialEq, Eq)]
pub struct RawStats {
    pub bytes_in: u64,
    pub instants: u64,
    /// Bytes of partial instants dropped by [`RawDecoder::reset`].
    pub bytes_dropped: u64,
}

/// Incremental decoder for the `raw` framing.
#[derive(Debug)]
pub struct RawDecoder {
    format: SampleFormat,
    channels: usize,
    /// Bytes of a partial instant, fewer than `instant_bytes`.
    carry: Vec<u8>,
    next_sample: u64,
    stats: RawStats,
}

impl RawDecoder {
    /// # Errors
    /// [`RawError::BadChannelCount`] unless `channels` is in 1..=1024.
    pub fn new(format: SampleFormat, channels: usize) -> Result<RawDecoder, RawError> {
        if !(1..=MAX_CHANNELS).contains(&channels) {
            return Err(RawError::BadChannelCount { channels });
        }
        Ok(RawDecoder {
            format,
            channels,
            carry: Vec::with_capacity(channels * format.width()),
            next_sample: 0,
            stats: RawStats::default(),
        })
    }

    pub fn format(&self) -> SampleFormat {
        self.format
    }

    pub fn channels(&self) -> usize {
        self.channels
    }

    /// Bytes of one instant, C·w.
    pub fn instant_bytes(&self) -> usize {
        self.channels * self.format.width()
    }

    /// Decodes the whole instants in the kept partial instant plus `bytes`
    /// into `out` (cleared first; its variant follows the format) and keeps
    /// the remainder for the next call.
    pub fn feed(&mut self, bytes: &[u8], out: &mut Samples) -> RawBatch {
        self.stats.bytes_in += bytes.len() as u64;
        out.reset_for(self.format);
        let w = self.instant_bytes();
        let mut rest = bytes;
        if !self.carry.is_empty() {
            let take = (w - self.carry.len()).min(rest.len());
            self.carry.extend_from_slice(&rest[..take]);
            rest = &rest[take..];
            if self.carry.len() == w {
                out.extend_decoded(self.format, &self.carry);
                self.carry.clear();
            }
        }
        let whole = rest.len() / w * w;
        out.extend_decoded(self.format, &rest[..whole]);
        self.carry.extend_from_slice(&rest[whole..]);
        let instants = out.len() / self.channels;
        let batch = RawBatch {
            first_sample: self.next_sample,
            instants,
        };
        self.next_sample += instants as u64;
        self.stats.instants += instants as u64;
        batch
    }

    /// The transport broke: drops the partial instant (counted). Instant
    /// indices keep counting up; mark the break as a discontinuity.
    /// Returns the bytes dropped.
    pub fn reset(&mut self) -> usize {
        let n = self.carry.len();
        self.stats.bytes_dropped += n as u64;
        self.carry.clear();
        n
    }

    /// Bytes of the partial instant held.
    pub fn pending_bytes(&self) -> usize {
        self.carry.len()
    }

    pub fn stats(&self) -> &RawStats {
        &self.stats
    }
}

#[cfg(test)]
#[allow(clippy::unwrap_used)] // tests may unwrap: a panic is a failed test
mod tests {
    use super::*;

    #[test]
    fn partial_instants_carry_over() {
        let mut d = RawDecoder::new(SampleFormat::I16, 2).unwrap();
        let mut out = Samples::default();
        // Instants (1, -1) and (2, 3), cut at odd places.
        let bytes = [1u8, 0, 0xFF, 0xFF, 2, 0, 3, 0];
        assert_eq!(
            d.feed(&bytes[..3], &mut out),
            RawBatch {
                first_sample: 0,
                instants: 0
            }
        );
        assert_eq!(d.pending_bytes(), 3);
        assert_eq!(
            d.feed(&bytes[3..7], &mut out),
            RawBatch {
                first_sample: 0,
                instants: 1
            }
        );
        assert_eq!(out, Samples::I16(vec![1, -1]));
        let b = d.feed(&bytes[7..], &mut out);
        assert_eq!(
            b,
            RawBatch {
                first_sample: 1,
                instants: 1
            }
        );
        assert_eq!(out, Samples::I16(vec![2, 3]));
        assert_eq!(d.pending_bytes(), 0);
    }

    #[test]
    fn channel_count_is_checked() {
        assert_eq!(
            RawDecoder::new(SampleFormat::F32, 0).err(),
            Some(RawError::BadChannelCount { channels: 0 })
        );
        assert!(RawDecoder::new(SampleFormat::F32, 1025).is_err());
    }
}
