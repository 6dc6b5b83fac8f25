//! The recent history of one channel's published numbers, kept in memory
//! for the operator page's trends (`GET /api/v1/channels/{name}/trend`).
//!
//! One point per second of wall-clock time (the publish time): for each
//! series (the overall levels, then the bands in the spec's order) the
//! minimum and maximum of the values published within that second, so no
//! spike between two points is lost, and the last one. A band whose status
//! is not ok stores NaN (served as null); the minimum and maximum are over
//! the ok values of the second (NaN when there was none).
//!
//! Storage is a ring allocated whole when the channel is built: `capacity`
//! slots of a time (u64) and 3 × f32 per series, i.e. 12 bytes per series
//! per second (README "Config reference", `trend_seconds`). A push takes a
//! small mutex, updates or starts one slot and allocates nothing; a reader
//! copies the slots it wants out under the same mutex (two `memcpy`s) and
//! builds its columns after releasing it, so a DSP worker never waits on
//! HTTP for longer than that copy.

use std::sync::{Mutex, MutexGuard};

use crate::dsp::bands::BandValue;
use crate::dsp::stats::Overall;

/// The overall levels a trend keeps, in the order of its first series.
pub const OVERALL_MEASURES: [&str; 5] = ["rms", "peak", "peak_to_peak", "crest_factor", "mean"];

/// Seconds of trend a channel keeps when the config does not say
/// (`[server] trend_seconds`).
pub const DEFAULT_TREND_SECONDS: usize = 600;

/// Values kept per series per slot: min, max, last.
const PER_SERIES: usize = 3;

fn overall_value(o: &Overall, i: usize) -> f64 {
    match i {
        0 => o.rms,
        1 => o.peak,
        2 => o.peak_to_peak,
        3 => o.crest_factor,
        _ => o.mean,
    }
}

struct Ring {
    /// Unix second of each slot.
    t: Vec<u64>,
    /// Per slot, per series: min, max, last.
    v: Vec<f32>,
    /// Slots in use (≤ capacity).
    len: usize,
    /// Index of the newest slot (meaningless while `len` is 0).
    head: usize,
}

/// A bounded per-second trend of one channel (see the module comment).
pub struct Trend {
    capacity: usize,
    series: usize,
    ring: Mutex<Ring>,
}

/// What a reader copied out of a trend: columns, oldest point first.
#[derive(Debug, Clone, PartialEq)]
pub struct TrendColumns {
    /// Unix seconds of the points.
    pub t: Vec<u64>,
    /// One per series (the overall levels of [`OVERALL_MEASURES`], then the
    /// bands): min, max and last per point; None where the value was not ok.
    pub series: Vec<SeriesColumns>,
}

#[derive(Debug, Clone, PartialEq, Default)]
pub struct SeriesColumns {
    pub min: Vec<Option<f32>>,
    pub max: Vec<Option<f32>>,
    pub last: Vec<Option<f32>>,
}

fn finite(x: f32) -> Option<f32> {
    x.is_finite().then_some(x)
}

impl Trend {
    /// A trend of `capacity_seconds` points (at least 1) for a channel with
    /// `bands` bands; the whole ring is allocated here.
    pub fn new(capacity_seconds: usize, bands: usize) -> Trend {
        let capacity = capacity_seconds.max(1);
        let series = OVERALL_MEASURES.len() + bands;
        Trend {
            capacity,
            series,
            ring: Mutex::new(Ring {
                t: vec![0; capacity],
                v: vec![f32::NAN; capacity * series * PER_SERIES],
                len: 0,
                head: 0,
            }),
        }
    }

    /// Points kept at most (one a second).
    pub fn capacity_seconds(&self) -> usize {
        self.capacity
    }

    /// Series per point: the overall levels, then the bands.
    pub fn series(&self) -> usize {
        self.series
    }

    /// Bytes the ring holds (the bound README states).
    pub fn memory_bytes(&self) -> usize {
        self.capacity * (std::mem::size_of::<u64>() + self.series * PER_SERIES * 4)
    }

    fn ring(&self) -> MutexGuard<'_, Ring> {
        // Every change leaves the ring consistent slot by slot: a panic
        // elsewhere while holding it does not make it unusable.
        self.ring.lock().unwrap_or_else(|e| e.into_inner())
    }

    /// Adds one published result at `unix_s` (wall clock, seconds): into
    /// the newest point when it is of the same second (or a clock stepped
    /// back), else as a new point, the oldest overwritten when the ring is
    /// full. Bands beyond the trend's series are ignored; missing ones
    /// store NaN. Allocates nothing.
    pub fn push(&self, unix_s: u64, overall: &Overall, bands: &[BandValue]) {
        let mut r = self.ring();
        let stride = self.series * PER_SERIES;
        let fresh = r.len == 0 || unix_s > r.t[r.head];
        if fresh {
            let head = if r.len == 0 {
                0
            } else {
                (r.head + 1) % self.capacity
            };
            r.head = head;
            r.len = (r.len + 1).min(self.capacity);
            r.t[head] = unix_s;
        }
        let base = r.head * stride;
        let slot = &mut r.v[base..base + stride];
        let value = |i: usize| -> f32 {
            if i < OVERALL_MEASURES.len() {
                overall_value(overall, i) as f32
            } else {
                match bands.get(i - OVERALL_MEASURES.len()) {
                    Some(b) if b.is_ok() => b.value as f32,
                    _ => f32::NAN,
                }
            }
        };
        for (i, cell) in slot.chunks_exact_mut(PER_SERIES).enumerate() {
            let v = value(i);
            if fresh {
                cell.copy_from_slice(&[v, v, v]);
                continue;
            }
            if !v.is_nan() {
                cell[0] = if cell[0].is_nan() { v } else { cell[0].min(v) };
                cell[1] = if cell[1].is_nan() { v } else { cell[1].max(v) };
            }
            cell[2] = v;
        }
    }

    /// The points of the last `seconds` (at most the capacity) up to
    /// `now_s`: those whose second is after `now_s - seconds`. The copy is
    /// made under the lock; the columns are built after it.
    pub fn read(&self, seconds: usize, now_s: u64) -> TrendColumns {
        let seconds = seconds.min(self.capacity) as u64;
        let from = now_s.saturating_sub(seconds);
        let stride = self.series * PER_SERIES;
        let (t, v) = {
            let r = self.ring();
            // Chronological order: the slots after head (when the ring has
            // wrapped), then those up to head.
            let start = (r.head + self.capacity + 1 - r.len) % self.capacity;
            let (a, b) = if start + r.len <= self.capacity {
                (start..start + r.len, 0..0)
            } else {
                (start..self.capacity, 0..(start + r.len - self.capacity))
            };
            let older = |s: usize| r.t[s] <= from;
            // Skip the points older than the window (they are oldest first).
            let skip_a = a.clone().take_while(|&s| older(s)).count();
            let skip_b = if skip_a == a.len() {
                b.clone().take_while(|&s| older(s)).count()
            } else {
                0
            };
            let a = a.start + skip_a..a.end;
            let b = b.start + skip_b..b.end;
            let mut t = Vec::with_capacity(a.len() + b.len());
            t.extend_from_slice(&r.t[a.clone()]);
            t.extend_from_slice(&r.t[b.clone()]);
            let mut v = Vec::with_capacity(t.len() * stride);
            v.extend_from_slice(&r.v[a.start * stride..a.end * stride]);
            v.extend_from_slice(&r.v[b.start * stride..b.end * stride]);
            (t, v)
        };
        let n = t.len();
        let mut series: Vec<SeriesColumns> = (0..self.series)
            .map(|_| SeriesColumns {
                min: Vec::with_capacity(n),
                max: Vec::with_capacity(n),
                last: Vec::with_capacity(n),
            })
            .collect();
        for point in v.chunks_exact(stride) {
            for (s, cell) in series.iter_mut().zip(point.chunks_exact(PER_SERIES)) {
                s.min.push(finite(cell[0]));
                s.max.push(finite(cell[1]));
                s.last.push(finite(cell[2]));
            }
        }
        TrendColumns { t, series }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::dsp::bands::BandStatus;

    fn overall(rms: f64) -> Overall {
        Overall {
            mean: 0.5,
            rms,
            peak: 2.0 * rms,
            peak_to_peak: 4.0 * rms,
            crest_factor: 2.0,
        }
    }

    fn band(value: f64, status: BandStatus) -> BandValue {
        BandValue {
            value,
            peak_hz: 10.0,
            lo_hz: 5.0,
            hi_hz: 20.0,
            status,
        }
    }

    #[test]
    fn min_max_last_within_a_second() {
        let tr = Trend::new(10, 1);
        tr.push(100, &overall(1.0), &[band(3.0, BandStatus::Ok)]);
        // A spike between two points: kept in the max.
        tr.push(100, &overall(9.0), &[band(1.0, BandStatus::Ok)]);
        tr.push(100, &overall(2.0), &[band(2.0, BandStatus::Ok)]);
        let c = tr.read(10, 100);
        assert_eq!(c.t, vec![100]);
        let rms = &c.series[0];
        assert_eq!(
            (rms.min[0], rms.max[0], rms.last[0]),
            (Some(1.0), Some(9.0), Some(2.0))
        );
        let b = &c.series[OVERALL_MEASURES.len()];
        assert_eq!(
            (b.min[0], b.max[0], b.last[0]),
            (Some(1.0), Some(3.0), Some(2.0))
        );
        // Peak is 2 × rms, crest factor constant, mean constant.
        assert_eq!(c.series[1].max[0], Some(18.0));
        assert_eq!(c.series[3].last[0], Some(2.0));
        assert_eq!(c.series[4].min[0], Some(0.5));
    }

    #[test]
    fn a_band_not_ok_is_null() {
        let tr = Trend::new(10, 2);
        for status in [
            BandStatus::NoSpeed,
            BandStatus::AboveNyquist,
            BandStatus::NoLine,
            BandStatus::OutOfRange,
        ] {
            let t = 200 + status as u64;
            tr.push(
                t,
                &overall(1.0),
                &[band(f64::NAN, status), band(4.0, BandStatus::Ok)],
            );
            // A stale value in a not-ok band is not stored either.
            tr.push(
                t,
                &overall(1.0),
                &[band(7.0, status), band(5.0, BandStatus::Ok)],
            );
            let c = tr.read(10, t);
            let b0 = &c.series[OVERALL_MEASURES.len()];
            let b1 = &c.series[OVERALL_MEASURES.len() + 1];
            let i = c.t.len() - 1;
            assert_eq!(
                (b0.min[i], b0.max[i], b0.last[i]),
                (None, None, None),
                "{status:?}"
            );
            assert_eq!(
                (b1.min[i], b1.max[i], b1.last[i]),
                (Some(4.0), Some(5.0), Some(5.0))
            );
        }
        // Ok then not ok within one second: min/max keep the ok value, the
        // last is null.
        tr.push(300, &overall(1.0), &[band(6.0, BandStatus::Ok)]);
        tr.push(300, &overall(1.0), &[band(0.0, BandStatus::NoSpeed)]);
        let c = tr.read(10, 300);
        let b0 = &c.series[OVERALL_MEASURES.len()];
        assert_eq!(
            (b0.min[0], b0.max[0], b0.last[0]),
            (Some(6.0), Some(6.0), None)
        );
        // A band the spec has but the result lacks: null.
        assert_eq!(c.series[OVERALL_MEASURES.len() + 1].last[0], None);
    }

    #[test]
    fn bounded_by_capacity() {
        let tr = Trend::new(5, 0);
        let before = tr.memory_bytes();
        for s in 0..1000u64 {
            tr.push(1_000 + s, &overall(s as f64), &[]);
        }
        assert_eq!(tr.memory_bytes(), before);
        assert_eq!(before, 5 * (8 + 5 * 3 * 4));
        let c = tr.read(1_000_000, 1_999);
        assert_eq!(c.t, vec![1_995, 1_996, 1_997, 1_998, 1_999]);
        assert_eq!(
            c.series[0].last,
            vec![
                Some(995.0),
                Some(996.0),
                Some(997.0),
                Some(998.0),
                Some(999.0)
            ]
        );
        // Fewer seconds asked: the newest.
        assert_eq!(tr.read(2, 1_999).t, vec![1_998, 1_999]);
    }

    #[test]
    fn evicted_by_age() {
        let tr = Trend::new(10, 0);
        for s in [10u64, 11, 12, 14] {
            tr.push(s, &overall(1.0), &[]);
        }
        assert_eq!(tr.read(10, 14).t, vec![10, 11, 12, 14]);
        // Seconds later, the old points leave the window although the ring
        // still holds them.
        assert_eq!(tr.read(10, 21).t, vec![12, 14]);
        assert!(tr.read(10, 100).t.is_empty());
        // A channel that stalled and came back: only the new point.
        tr.push(100, &overall(2.0), &[]);
        let c = tr.read(10, 100);
        assert_eq!(c.t, vec![100]);
        assert_eq!(c.series[0].last, vec![Some(2.0)]);
        // Across the ring's wrap.
        for s in 101..=115u64 {
            tr.push(s, &overall(s as f64), &[]);
        }
        assert_eq!(tr.read(10, 115).t, (106..=115).collect::<Vec<_>>());
        assert_eq!(tr.read(3, 115).t, vec![113, 114, 115]);
    }

    #[test]
    fn a_clock_stepped_back_adds_to_the_newest_point() {
        let tr = Trend::new(10, 0);
        tr.push(50, &overall(1.0), &[]);
        tr.push(49, &overall(3.0), &[]);
        let c = tr.read(10, 50);
        assert_eq!(c.t, vec![50]);
        assert_eq!(c.series[0].max, vec![Some(3.0)]);
    }
}
