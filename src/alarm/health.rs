//! Channel health ("not OK") judged from the data itself.
//!
//! The detector is fed the raw samples of one channel (in units, as the ring
//! hands them to the DSP worker), the discontinuities, and a clock tick. It
//! judges the samples in fixed evaluation windows of [`EVAL_WINDOW_S`]
//! seconds, so the result does not depend on how the worker chunks its
//! reads. Faults:
//!
//! - **flatline**: the standard deviation of every window stays below
//!   `std_below` for `for_s` seconds (a dead or disconnected sensor, a stuck
//!   converter; common practice: about 1 LSB for 1 s or more);
//! - **clipping**: at least `samples` samples of one window at or beyond
//!   `fraction × full_scale` in magnitude (common practice: 0.99 × full
//!   scale);
//! - **bias**: a window's mean outside `[lo, hi]` (for DC-coupled sensor
//!   supplies: an IEPE bias out of its window means an open or short;
//!   common practice: roughly 2 to 20 V on a 24 V supply);
//! - **stale**: no samples for `after_s` seconds (checked by [`tick`]);
//! - **gaps**: more than `max` discontinuities within `window_s` seconds;
//! - **no data**: nothing received yet since start;
//! - **out of range**: the newest result of the channel could not be
//!   measured: a band's power passed the f32 range
//!   (`BandStatus::OutOfRange`) or the samples' excursions did
//!   ([`crate::dsp::stats::out_of_range`]): an absurd value from the sensor
//!   or its scaling, never a level to trust. Set and cleared per published
//!   result by [`HealthDetector::results`].
//!
//! Any fault makes the channel not OK at once. It is OK again only after no
//! fault has been present for `recover_s` seconds (a delay before
//! re-enabling, as protection practice does). While not OK the reasons shown
//! are the faults present, or, during the recovery delay, the last ones.
//!
//! Pure: no I/O, no allocation after construction.
//!
//! [`tick`]: HealthDetector::tick

use std::collections::VecDeque;

use serde::Serialize;

use crate::dsp::simd::{moments, vectorized};

/// Length of one evaluation window, seconds.
pub const EVAL_WINDOW_S: f64 = 0.1;

/// Smallest number of samples per evaluation window.
pub const MIN_EVAL_SAMPLES: usize = 16;

pub use crate::config::alarms::{
    BiasSpec, ClippingSpec, FlatlineSpec, GapSpec, HealthSpec, StaleSpec,
};

/// One reason for a channel being not OK.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum Reason {
    NoData,
    Flatline,
    Clipping,
    Bias,
    Stale,
    Gaps,
    OutOfRange,
}

impl Reason {
    pub const ALL: [Reason; 7] = [
        Reason::NoData,
        Reason::Flatline,
        Reason::Clipping,
        Reason::Bias,
        Reason::Stale,
        Reason::Gaps,
        Reason::OutOfRange,
    ];

    pub fn as_str(self) -> &'static str {
        match self {
            Reason::NoData => "no_data",
            Reason::Flatline => "flatline",
            Reason::Clipping => "clipping",
            Reason::Bias => "bias",
            Reason::Stale => "stale",
            Reason::Gaps => "gaps",
            Reason::OutOfRange => "out_of_range",
        }
    }

    fn bit(self) -> u8 {
        1 << (self as u8)
    }
}

/// A set of [`Reason`]s (a bit set: copying it never allocates).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default, Hash)]
pub struct Reasons(u8);

impl Reasons {
    pub fn contains(self, r: Reason) -> bool {
        self.0 & r.bit() != 0
    }
    pub fn insert(&mut self, r: Reason) {
        self.0 |= r.bit();
    }
    pub fn remove(&mut self, r: Reason) {
        self.0 &= !r.bit();
    }
    fn set(&mut self, r: Reason, on: bool) {
        if on {
            self.insert(r)
        } else {
            self.remove(r)
        }
    }
    pub fn is_empty(self) -> bool {
        self.0 == 0
    }
    pub fn iter(self) -> impl Iterator<Item = Reason> {
        Reason::ALL.into_iter().filter(move |r| self.contains(*r))
    }
    /// Names, for JSON and the journal.
    pub fn names(self) -> Vec<&'static str> {
        self.iter().map(Reason::as_str).collect()
    }
}

impl Serialize for Reasons {
    fn serialize<S: serde::Serializer>(&self, s: S) -> Result<S::Ok, S::Error> {
        s.collect_seq(self.iter().map(Reason::as_str))
    }
}

/// What the detector reports.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct HealthState {
    pub ok: bool,
    /// Faults present; during the recovery delay, the last faults seen.
    pub reasons: Reasons,
    /// Monotonic seconds of the last change of `ok`.
    pub since: f64,
}

/// `ok` flipped.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct HealthChange {
    pub at: f64,
    pub ok: bool,
    pub reasons: Reasons,
}

/// Figures of the last complete evaluation window, for the API.
#[derive(Debug, Clone, Copy, PartialEq, Default, Serialize)]
pub struct WindowStats {
    pub mean: f64,
    pub std: f64,
    pub clipped: usize,
}

/// Health of one channel. See the module docs.
#[derive(Debug, Clone)]
pub struct HealthDetector {
    spec: HealthSpec,
    rate: f64,
    window_len: usize,
    // Running sums of the current window (shifted by its first sample, so
    // that a large DC level does not cost precision).
    w_n: usize,
    w_shift: f64,
    w_sum: f64,
    w_sum2: f64,
    w_clipped: usize,
    last: WindowStats,
    faults: Reasons,
    shown: Reasons,
    ok: bool,
    since: f64,
    clear_since: Option<f64>,
    last_sample_at: f64,
    flat_since: Option<f64>,
    gap_times: VecDeque<f64>,
}

impl HealthDetector {
    /// A detector for a channel sampled at `sample_rate_hz`, started at
    /// `now`; it is not OK (no data) until samples arrive and the recovery
    /// delay has passed.
    pub fn new(spec: HealthSpec, sample_rate_hz: f64, now: f64) -> HealthDetector {
        let window_len = ((EVAL_WINDOW_S * sample_rate_hz).round() as usize).max(MIN_EVAL_SAMPLES);
        let gap_cap = spec.gaps.map_or(0, |g| g.max as usize + 1);
        let mut faults = Reasons::default();
        faults.insert(Reason::NoData);
        HealthDetector {
            spec,
            rate: sample_rate_hz,
            window_len,
            w_n: 0,
            w_shift: 0.0,
            w_sum: 0.0,
            w_sum2: 0.0,
            w_clipped: 0,
            last: WindowStats::default(),
            faults,
            shown: faults,
            ok: false,
            since: now,
            clear_since: None,
            last_sample_at: now,
            flat_since: None,
            gap_times: VecDeque::with_capacity(gap_cap),
        }
    }

    pub fn spec(&self) -> &HealthSpec {
        &self.spec
    }

    /// Samples per evaluation window.
    pub fn window_len(&self) -> usize {
        self.window_len
    }

    pub fn state(&self) -> HealthState {
        HealthState {
            ok: self.ok,
            reasons: self.shown,
            since: self.since,
        }
    }

    pub fn is_ok(&self) -> bool {
        self.ok
    }

    pub fn last_window(&self) -> WindowStats {
        self.last
    }

    /// Feeds contiguous samples; `now` is the time of the last one.
    /// Non-finite samples are skipped (the ring counts them as gaps).
    pub fn feed(&mut self, now: f64, samples: &[f32]) -> Option<HealthChange> {
        let n = samples.len();
        if n > 0 {
            self.last_sample_at = now;
            self.faults.remove(Reason::NoData);
            self.faults.remove(Reason::Stale);
        }
        let clip_at = self.spec.clipping.map(|c| c.fraction * c.full_scale);
        // Samples from the ring are always finite; then whole runs up to
        // the next window boundary are summed at once (vectorised). A run
        // holding a non-finite sample takes the sample-by-sample way.
        let mut start = 0;
        while start < n {
            let take = (self.window_len - self.w_n).min(n - start);
            let run = &samples[start..start + take];
            let shift = if self.w_n == 0 {
                f64::from(run[0])
            } else {
                self.w_shift
            };
            let Some((sum, sum2, clipped)) = window_sums(run, shift, clip_at) else {
                self.feed_one_by_one(now, samples, start, take, clip_at);
                start += take;
                continue;
            };
            self.w_shift = shift;
            self.w_n += take;
            self.w_sum += sum;
            self.w_sum2 += sum2;
            self.w_clipped += clipped;
            start += take;
            if self.w_n == self.window_len {
                let t_end = now - (n - start) as f64 / self.rate;
                self.window_done(t_end);
            }
        }
        self.update(now)
    }

    /// The sample-by-sample form of [`feed`](Self::feed) for
    /// `samples[start..start + take]` (skips non-finite samples).
    fn feed_one_by_one(
        &mut self,
        now: f64,
        samples: &[f32],
        start: usize,
        take: usize,
        clip_at: Option<f64>,
    ) {
        let n = samples.len();
        for (i, &x) in samples.iter().enumerate().skip(start).take(take) {
            if !x.is_finite() {
                continue;
            }
            let x = f64::from(x);
            if self.w_n == 0 {
                self.w_shift = x;
            }
            let d = x - self.w_shift;
            self.w_n += 1;
            self.w_sum += d;
            self.w_sum2 += d * d;
            if clip_at.is_some_and(|c| x.abs() >= c) {
                self.w_clipped += 1;
            }
            if self.w_n == self.window_len {
                let t_end = now - (n - 1 - i) as f64 / self.rate;
                self.window_done(t_end);
            }
        }
    }

    fn window_done(&mut self, t_end: f64) {
        let n = self.w_n as f64;
        let mean_d = self.w_sum / n;
        let var = ((self.w_sum2 - n * mean_d * mean_d) / (n - 1.0)).max(0.0);
        self.last = WindowStats {
            mean: self.w_shift + mean_d,
            std: var.sqrt(),
            clipped: self.w_clipped,
        };
        self.w_n = 0;
        self.w_sum = 0.0;
        self.w_sum2 = 0.0;
        self.w_clipped = 0;
        let t_start = t_end - n / self.rate;
        if let Some(f) = self.spec.flatline {
            if self.last.std < f.std_below {
                let since = *self.flat_since.get_or_insert(t_start);
                if t_end - since >= f.for_s {
                    self.faults.insert(Reason::Flatline);
                }
            } else {
                self.flat_since = None;
                self.faults.remove(Reason::Flatline);
            }
        }
        if let Some(c) = self.spec.clipping {
            self.faults
                .set(Reason::Clipping, self.last.clipped >= c.samples);
        }
        if let Some(b) = self.spec.bias {
            let m = self.last.mean;
            self.faults.set(Reason::Bias, !(b.lo..=b.hi).contains(&m));
        }
    }

    /// One discontinuity at `now`. The current evaluation window is dropped
    /// (a window never spans a gap).
    pub fn gap(&mut self, now: f64) -> Option<HealthChange> {
        self.w_n = 0;
        self.w_sum = 0.0;
        self.w_sum2 = 0.0;
        self.w_clipped = 0;
        if let Some(g) = self.spec.gaps {
            if self.gap_times.len() > g.max as usize {
                self.gap_times.pop_front();
            }
            self.gap_times.push_back(now);
        }
        self.update(now)
    }

    /// A result was published at `now`: `out_of_range` says whether any
    /// of its values (overall levels, bands) could not be measured. Sets or
    /// clears the `out_of_range` fault.
    pub fn results(&mut self, now: f64, out_of_range: bool) -> Option<HealthChange> {
        self.faults.set(Reason::OutOfRange, out_of_range);
        self.update(now)
    }

    /// Time passes: stale data, expiring gaps, the recovery delay. Call it
    /// regularly (e.g. every worker turn or every 100 ms).
    pub fn tick(&mut self, now: f64) -> Option<HealthChange> {
        self.update(now)
    }

    fn update(&mut self, now: f64) -> Option<HealthChange> {
        if let Some(s) = self.spec.stale {
            if now - self.last_sample_at >= s.after_s && !self.faults.contains(Reason::NoData) {
                self.faults.insert(Reason::Stale);
            }
        }
        if let Some(g) = self.spec.gaps {
            while self
                .gap_times
                .front()
                .is_some_and(|&t| now - t > g.window_s)
            {
                self.gap_times.pop_front();
            }
            self.faults
                .set(Reason::Gaps, self.gap_times.len() > g.max as usize);
        }
        if !self.faults.is_empty() {
            self.shown = self.faults;
            self.clear_since = None;
            if self.ok {
                self.ok = false;
                self.since = now;
                return Some(HealthChange {
                    at: now,
                    ok: false,
                    reasons: self.shown,
                });
            }
        } else if !self.ok {
            let since = *self.clear_since.get_or_insert(now);
            if now - since >= self.spec.recover_s {
                self.ok = true;
                self.since = now;
                self.clear_since = None;
                let reasons = self.shown;
                self.shown = Reasons::default();
                return Some(HealthChange {
                    at: now,
                    ok: true,
                    reasons,
                });
            }
        }
        None
    }
}

/// Σd, Σd² (d = x − shift) and the count of |x| ≥ `clip_at` over a run of
/// samples; `None` if the run holds a non-finite sample. The sums run in
/// f32 vector lanes flushed into f64 (`simd::moments`: relative error below
/// about 2e-6, far finer than the flatline and bias thresholds they feed);
/// `shift` is a sample of the window (its first), so d stays small next to
/// a DC offset.
fn window_sums(run: &[f32], shift: f64, clip_at: Option<f64>) -> Option<(f64, f64, usize)> {
    // |x| ≥ clip for an f32 x is |x| ≥ the least f32 not below clip.
    let clip = clip_at.map_or(f32::INFINITY, |c| {
        let c32 = c as f32;
        if f64::from(c32) < c {
            c32.next_up()
        } else {
            c32
        }
    });
    let (clipped, bad) = vectorized(
        #[inline(always)]
        || {
            (
                run.iter().filter(|x| x.abs() >= clip).count(),
                run.iter().filter(|x| !x.is_finite()).count(),
            )
        },
    );
    if bad > 0 {
        return None;
    }
    let m = moments(run, shift as f32);
    Some((m.sum, m.sum2, clipped))
}
