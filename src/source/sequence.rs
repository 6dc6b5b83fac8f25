//! The sequence rules of framed sources (README, "Sequence rules"): given
//! the index of each frame's first instant, whether the frame continues
//! the stream, leaves a gap, is late, or starts the stream over.
//!
//! - the next frame should start where the last one taken ended;
//! - ahead of that by at most a plausible bound (`max_gap_s` of samples
//!   plus the wall time since the last frame taken, at the source's rate):
//!   a gap, the instants in between are missing;
//! - ahead by more: a restart (`forward_jump`); the frame is taken as the
//!   first of a new sequence, nothing is counted missing;
//! - behind by at most the reorder window: a late or duplicate frame,
//!   dropped; except that [`RESTART_RUN`] frames in a row that follow on
//!   from each other and repeat instants already taken (not stragglers
//!   filling the last gap) are a new sequence: a restart (`backward_jump`)
//!   from the last of them;
//! - behind by more than the window: a restart (`backward_jump`);
//! - a frame whose instants would run past the end of the u64 index space:
//!   dropped, a restart (`index_wrap`); the next frame starts a new
//!   sequence.
//!
//! Every decision is a pure function of the indices and the time, so it
//! is tested here without sockets; `framed::FrameSink` does the counting.

use std::time::Instant;

use crate::config::SequenceSpec;
use crate::counters::RestartReason;

/// Consecutive frames behind the stream, each following on from the one
/// before, that make a new sequence (a DAQ box restarted within the reorder
/// window). Two in a row can still be a duplicated pair.
pub const RESTART_RUN: u32 = 3;

/// What to do with one frame.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Verdict {
    /// Take it; `missing` instants were skipped before it (0: contiguous).
    Take { missing: u64 },
    /// Take it as the first frame of a new sequence. `refused` instants of
    /// the frames just before it were dropped as late and, it turns out,
    /// belonged to this new sequence.
    Restart { reason: RestartReason, refused: u64 },
    /// A duplicate or late frame: drop it.
    Late,
    /// Its instants would run past `u64::MAX`: drop it; the sequence
    /// starts over at the next frame.
    Wrap,
}

/// The sequence state of one source.
#[derive(Debug, Clone)]
pub struct Sequencer {
    /// Reorder window, instants.
    window: u64,
    /// Forward jump always plausible, instants.
    max_gap: u64,
    sample_rate_hz: f64,
    /// Index the next contiguous frame starts at.
    next: Option<u64>,
    /// When the last frame was taken.
    last_take: Option<Instant>,
    /// The last gap counted missing, `[start, end)`: late frames inside it
    /// are stragglers, never part of a restart run.
    hole: Option<(u64, u64)>,
    /// Late frames in a row that follow on from each other: where the run
    /// would continue, frames in it, instants in it.
    run: Option<(u64, u32, u64)>,
}

impl Sequencer {
    pub fn new(spec: &SequenceSpec, sample_rate_hz: f64) -> Sequencer {
        // Seconds to instants; `as` saturates, and the config bounds both.
        let instants = |s: f64| (s * sample_rate_hz).round() as u64;
        Sequencer {
            window: instants(spec.reorder_window_s),
            max_gap: instants(spec.max_gap_s),
            sample_rate_hz,
            next: None,
            last_take: None,
            hole: None,
            run: None,
        }
    }

    /// A new connection or a reopened port: the next frame starts a new
    /// sequence, whatever its index.
    pub fn reset(&mut self) {
        self.next = None;
        self.last_take = None;
        self.hole = None;
        self.run = None;
    }

    /// Where the next contiguous frame would start.
    pub fn next(&self) -> Option<u64> {
        self.next
    }

    /// The largest forward jump that is a gap rather than a restart, now.
    fn plausible_gap(&self, now: Instant) -> u64 {
        let elapsed = self
            .last_take
            .map_or(0.0, |t| now.saturating_duration_since(t).as_secs_f64());
        // `as` saturates at u64::MAX; the sum saturates too.
        self.max_gap
            .saturating_add((elapsed * self.sample_rate_hz).ceil() as u64)
    }

    /// Decides about a frame of `instants` instants starting at index
    /// `first`, arriving at `now`, and moves the sequence on.
    pub fn admit(&mut self, first: u64, instants: u64, now: Instant) -> Verdict {
        let Some(end) = first.checked_add(instants) else {
            self.reset();
            return Verdict::Wrap;
        };
        let verdict = match self.next {
            None => Verdict::Take { missing: 0 },
            Some(next) if first == next => Verdict::Take { missing: 0 },
            Some(next) if first > next => {
                let gap = first - next;
                if gap <= self.plausible_gap(now) {
                    Verdict::Take { missing: gap }
                } else {
                    Verdict::Restart {
                        reason: RestartReason::ForwardJump,
                        refused: 0,
                    }
                }
            }
            Some(next) => {
                if next - first > self.window {
                    Verdict::Restart {
                        reason: RestartReason::BackwardJump,
                        refused: 0,
                    }
                } else if self.hole.is_some_and(|(lo, hi)| first >= lo && end <= hi) {
                    // A straggler that fills (part of) the last gap: its
                    // instants are already counted missing.
                    self.run = None;
                    return Verdict::Late;
                } else {
                    let run = match self.run {
                        Some((at, n, k)) if at == first => (end, n + 1, k + instants),
                        _ => (end, 1, instants),
                    };
                    if run.1 < RESTART_RUN {
                        self.run = Some(run);
                        return Verdict::Late;
                    }
                    Verdict::Restart {
                        reason: RestartReason::BackwardJump,
                        refused: run.2 - instants,
                    }
                }
            }
        };
        if let Verdict::Take { missing } = verdict {
            self.hole = (missing > 0).then(|| (first - missing, first));
        } else {
            self.hole = None;
        }
        self.next = Some(end);
        self.last_take = Some(now);
        self.run = None;
        verdict
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use std::time::Duration;

    const S: u64 = 256;

    /// 1 s reorder window, 10 s plausible gap, at 25 600 Hz.
    fn seq() -> Sequencer {
        Sequencer::new(
            &SequenceSpec {
                reorder_window_s: 1.0,
                max_gap_s: 10.0,
            },
            25_600.0,
        )
    }

    fn take(n: u64) -> Verdict {
        Verdict::Take { missing: n }
    }

    #[test]
    fn contiguous_gap_duplicate_and_straggler() {
        let mut q = seq();
        let t = Instant::now();
        assert_eq!(q.admit(0, S, t), take(0));
        assert_eq!(q.admit(S, S, t), take(0));
        assert_eq!(q.admit(S, S, t), Verdict::Late, "duplicate");
        assert_eq!(q.admit(4 * S, S, t), take(2 * S), "gap of frames 2 and 3");
        assert_eq!(q.admit(2 * S, S, t), Verdict::Late, "straggler");
        assert_eq!(q.admit(3 * S, S, t), Verdict::Late, "straggler");
        assert_eq!(q.admit(5 * S, S, t), take(0));
        assert_eq!(q.next(), Some(6 * S));
    }

    /// Stragglers of one gap never make a restart run, however many.
    #[test]
    fn a_long_reorder_is_late_frames_not_a_restart() {
        let mut q = seq();
        let t = Instant::now();
        assert_eq!(q.admit(0, S, t), take(0));
        assert_eq!(q.admit(6 * S, S, t), take(5 * S));
        for i in 1..6 {
            assert_eq!(q.admit(i * S, S, t), Verdict::Late, "frame {i}");
        }
        assert_eq!(q.admit(7 * S, S, t), take(0));
    }

    /// A DAQ box that restarts after more than the window: taken at once.
    #[test]
    fn backward_beyond_the_window_is_a_restart() {
        let mut q = seq();
        let t = Instant::now();
        assert_eq!(q.admit(0, S, t), take(0));
        assert_eq!(q.admit(300 * S, S, t), take(299 * S));
        assert_eq!(
            q.admit(0, S, t),
            Verdict::Restart {
                reason: RestartReason::BackwardJump,
                refused: 0
            }
        );
        assert_eq!(q.admit(S, S, t), take(0));
    }

    /// A DAQ box that restarts within the window: its third frame in a row
    /// starts the new sequence, the two before are counted as refused.
    #[test]
    fn backward_within_the_window_is_a_restart_by_its_third_frame() {
        let mut q = seq();
        let t = Instant::now();
        for i in 0..50 {
            assert_eq!(q.admit(i * S, S, t), take(0));
        }
        assert_eq!(q.admit(0, S, t), Verdict::Late);
        assert_eq!(q.admit(S, S, t), Verdict::Late);
        assert_eq!(
            q.admit(2 * S, S, t),
            Verdict::Restart {
                reason: RestartReason::BackwardJump,
                refused: 2 * S
            }
        );
        assert_eq!(q.admit(3 * S, S, t), take(0));
    }

    /// One stray frame at 2^62: a restart there and a restart back, no
    /// gap counted, no frame after it lost.
    #[test]
    fn one_frame_far_ahead_costs_two_restarts_and_nothing_else() {
        let mut q = seq();
        let t = Instant::now();
        assert_eq!(q.admit(0, S, t), take(0));
        assert_eq!(
            q.admit(1 << 62, S, t),
            Verdict::Restart {
                reason: RestartReason::ForwardJump,
                refused: 0
            }
        );
        assert_eq!(
            q.admit(S, S, t),
            Verdict::Restart {
                reason: RestartReason::BackwardJump,
                refused: 0
            }
        );
        assert_eq!(q.admit(2 * S, S, t), take(0));
    }

    /// A forward jump longer than `max_gap_s` is still a gap when the wall
    /// time since the last frame explains it (a link down for a minute).
    #[test]
    fn the_plausible_gap_grows_with_the_time_since_the_last_frame() {
        let mut q = seq();
        let t = Instant::now();
        assert_eq!(q.admit(0, S, t), take(0));
        let minute = 60 * 25_600;
        assert_eq!(
            q.admit(S + minute, S, t + Duration::from_secs(61)),
            take(minute)
        );
        let mut q = seq();
        assert_eq!(q.admit(0, S, t), take(0));
        assert!(matches!(
            q.admit(S + minute, S, t + Duration::from_secs(1)),
            Verdict::Restart {
                reason: RestartReason::ForwardJump,
                ..
            }
        ));
    }

    #[test]
    fn a_frame_past_the_end_of_the_index_space_is_a_wrap() {
        let mut q = seq();
        let t = Instant::now();
        assert_eq!(q.admit(0, S, t), take(0));
        assert_eq!(q.admit(u64::MAX - 127, S, t), Verdict::Wrap);
        assert_eq!(q.next(), None);
        assert_eq!(q.admit(0, S, t), take(0));
        // Ending exactly at u64::MAX still fits.
        let mut q = seq();
        assert_eq!(q.admit(u64::MAX - S, S, t), take(0));
    }
}
