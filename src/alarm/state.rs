//! The alarm state machine of one band or overall measure.
//!
//! Each alarm has up to two levels, **alert** and **danger** (the trade's
//! terms), each with its own limit, direction (high: at or above the limit
//! is abnormal; low: at or below), hysteresis and delays. Every level is a
//! Schmitt trigger followed by a delay timer:
//!
//! 1. *Condition* (with hysteresis): a high level's condition becomes true
//!    when `value >= limit` and false again only when `value < limit −
//!    hysteresis` (a low level: true at `value <= limit`, false at `value >
//!    limit + hysteresis`). In between it keeps its previous value.
//! 2. *Qualified* (with delays): the level becomes active once its condition
//!    has been true on every evaluation for `on_delay_s` (measured from the
//!    first evaluation where it was true), and inactive once it has been
//!    false for `off_delay_s`. A delay of 0 acts on the first evaluation.
//!
//! The alarm's *active severity* is danger if the danger level is active,
//! else alert if the alert level is, else normal. Levels are independent, so
//! an alarm may use only one of them, or mix directions.
//!
//! **Latching.** A non-latching alarm shows its active severity. A latching
//! alarm remembers the highest severity reached (the *latch*) and shows it
//! until acknowledged. On [`AlarmMachine::acknowledge`]:
//! - if the condition has cleared (active severity normal), the latch is
//!   released and the alarm returns to normal at once;
//! - if the condition persists, the ack is recorded, the latch drops to the
//!   active severity, and from then on follows the live condition down: the
//!   alarm unlatches by itself when the condition clears. A new rise above
//!   the acknowledged severity latches again and needs a new ack.
//!
//! **Inhibit** ([`Input::Inhibited`], the channel is not OK): the alarm shows
//! `inhibited`; both levels are reset (pending on-delays cancelled, active
//! levels dropped) without a level transition; the latch is kept as it was.
//! When good data returns the alarm shows its latch (or normal) and every
//! level must qualify again from scratch, delays included.
//!
//! **No data** ([`Input::NoData`], a gap, or a non-finite value): the alarm
//! holds its state; any pending delay is cancelled, because a trip or a clear
//! must be qualified on continuous data. A gap never trips a level.
//!
//! Times are seconds on a monotonic clock (`f64`); a time earlier than the
//! previous one is treated as no time elapsed.

use serde::{Deserialize, Serialize};

use super::baseline::Baseline;
use crate::config::alarms::AlarmSpec;
pub use crate::config::alarms::Direction;
use crate::config::alarms::LevelConfig;
use crate::config::alarms::LimitSource;

/// Severity of a level, ordered: normal < alert < danger.
#[derive(
    Debug,
    Clone,
    Copy,
    PartialEq,
    Eq,
    PartialOrd,
    Ord,
    Hash,
    Default,
    Serialize,
    Deserialize,
    utoipa::ToSchema,
)]
#[serde(rename_all = "kebab-case")]
pub enum Severity {
    #[default]
    Normal,
    Alert,
    Danger,
}

impl Severity {
    pub fn as_str(self) -> &'static str {
        match self {
            Severity::Normal => "normal",
            Severity::Alert => "alert",
            Severity::Danger => "danger",
        }
    }
}

/// What an alarm shows.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Default, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum AlarmState {
    #[default]
    Normal,
    Alert,
    Danger,
    /// The channel is not OK: the band's levels are not evaluated.
    Inhibited,
}

impl AlarmState {
    pub const ALL: [AlarmState; 4] = [
        AlarmState::Normal,
        AlarmState::Alert,
        AlarmState::Danger,
        AlarmState::Inhibited,
    ];

    pub fn as_str(self) -> &'static str {
        match self {
            AlarmState::Normal => "normal",
            AlarmState::Alert => "alert",
            AlarmState::Danger => "danger",
            AlarmState::Inhibited => "inhibited",
        }
    }

    /// Value of the `bandwatch_alarm_state` gauge: 0 normal, 1 alert,
    /// 2 danger, −1 inhibited.
    pub fn metric_value(self) -> i64 {
        match self {
            AlarmState::Normal => 0,
            AlarmState::Alert => 1,
            AlarmState::Danger => 2,
            AlarmState::Inhibited => -1,
        }
    }

    /// Parses [`as_str`](Self::as_str) back (journal replay).
    pub fn parse(s: &str) -> Option<AlarmState> {
        AlarmState::ALL.into_iter().find(|a| a.as_str() == s)
    }

    fn index(self) -> usize {
        match self {
            AlarmState::Normal => 0,
            AlarmState::Alert => 1,
            AlarmState::Danger => 2,
            AlarmState::Inhibited => 3,
        }
    }
}

impl From<Severity> for AlarmState {
    fn from(s: Severity) -> AlarmState {
        match s {
            Severity::Normal => AlarmState::Normal,
            Severity::Alert => AlarmState::Alert,
            Severity::Danger => AlarmState::Danger,
        }
    }
}

/// One level (alert or danger) as the machine runs it.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct LevelSpec {
    /// The limit in the band's unit; `None` disables the level (e.g. a
    /// baseline still being learned).
    pub limit: Option<f64>,
    pub direction: Direction,
    /// Deadband on the way back, in the band's unit, >= 0.
    pub hysteresis: f64,
    /// Seconds the condition must hold before the level becomes active.
    pub on_delay_s: f64,
    /// Seconds the condition must be absent before the level clears.
    pub off_delay_s: f64,
}

/// Everything an [`AlarmMachine`] needs.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct AlarmLevels {
    pub alert: Option<LevelSpec>,
    pub danger: Option<LevelSpec>,
    /// Latching alarms hold their highest state until acknowledged.
    pub latching: bool,
}

/// Resolving a configured alarm into the levels a machine runs (the config
/// holds the data; the alarm stage gives it behaviour).
impl AlarmSpec {
    /// The alarm levels with limits resolved: fixed ones as given, zone ones
    /// converted to the band's velocity unit (`unit_to_si`: its factor to
    /// m/s), baseline ones from `baseline` (`None` while learning: that
    /// level is off until the baseline exists).
    pub fn levels(&self, baseline: Option<&Baseline>, unit_to_si: f64) -> AlarmLevels {
        let zone = self.zone.map(|z| z.limits(unit_to_si));
        let level = |l: &LevelConfig, is_danger: bool| LevelSpec {
            limit: match l.source {
                LimitSource::Fixed(v) => Some(v),
                LimitSource::Baseline(rule) => baseline.map(|b| b.limit(rule, l.direction)),
                LimitSource::Zone => zone.map(|z| if is_danger { z.danger } else { z.alert }),
            },
            direction: l.direction,
            hysteresis: l.hysteresis,
            on_delay_s: l.on_delay_s,
            off_delay_s: l.off_delay_s,
        };
        AlarmLevels {
            alert: self.alert.as_ref().map(|l| level(l, false)),
            danger: self.danger.as_ref().map(|l| level(l, true)),
            latching: self.latching,
        }
    }
}

/// One evaluation's input.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Input {
    /// A fresh band value from healthy data.
    Value(f64),
    /// The channel is not OK.
    Inhibited,
    /// No fresh value (a data gap, no block yet).
    NoData,
}

/// Why the shown state changed.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum Cause {
    /// A level became active: the rising edge that starts a capture.
    Trip,
    /// A level cleared (or an acknowledged latch followed it down).
    Clear,
    /// The channel went not OK.
    Inhibit,
    /// The channel is OK again.
    Release,
    /// An operator acknowledged and the shown state dropped.
    Ack,
}

impl Cause {
    pub fn as_str(self) -> &'static str {
        match self {
            Cause::Trip => "trip",
            Cause::Clear => "clear",
            Cause::Inhibit => "inhibit",
            Cause::Release => "release",
            Cause::Ack => "ack",
        }
    }
}

/// A change of the shown state.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct Transition {
    /// Monotonic seconds of the evaluation (or ack) that changed it.
    pub at: f64,
    pub from: AlarmState,
    pub to: AlarmState,
    pub cause: Cause,
    /// The value evaluated, if the change came from a value.
    pub value: Option<f64>,
}

/// Result of a successful acknowledge.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum AckOutcome {
    /// The condition had cleared: the latch is released.
    Cleared { transition: Option<Transition> },
    /// The condition persists: the ack is recorded; the alarm unlatches by
    /// itself when the condition clears.
    Acknowledged { transition: Option<Transition> },
    /// It was acknowledged already; nothing changed.
    AlreadyAcknowledged,
}

impl AckOutcome {
    pub fn as_str(&self) -> &'static str {
        match self {
            AckOutcome::Cleared { .. } => "cleared",
            AckOutcome::Acknowledged { .. } => "acknowledged",
            AckOutcome::AlreadyAcknowledged => "already-acknowledged",
        }
    }

    pub fn transition(&self) -> Option<Transition> {
        match self {
            AckOutcome::Cleared { transition } | AckOutcome::Acknowledged { transition } => {
                *transition
            }
            AckOutcome::AlreadyAcknowledged => None,
        }
    }
}

/// Why an acknowledge was refused (nothing changed).
#[derive(Debug, Clone, Copy, PartialEq, Eq, thiserror::Error)]
pub enum AckError {
    #[error("alarm is not latching: there is nothing to acknowledge")]
    NotLatching,
    #[error("alarm is not latched: there is nothing to acknowledge")]
    NotLatched,
}

/// The part of an alarm's state that must survive a restart: the latch and
/// its ack. Live conditions are not kept: they re-qualify on fresh data.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default, Serialize, Deserialize)]
pub struct AlarmMemory {
    /// Highest severity latched and not yet released.
    pub latched: Severity,
    /// The latch was acknowledged while its condition persisted.
    pub acknowledged: bool,
}

/// What an alarm shows now.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct AlarmStatus {
    pub state: AlarmState,
    /// A latching alarm holds a severity above its live condition, or holds
    /// one that is not yet acknowledged.
    pub latched: bool,
    /// The latch was acknowledged; it releases when the condition clears.
    pub acknowledged: bool,
    /// Monotonic seconds of the last change of `state`.
    pub since: f64,
    /// The live (qualified) severity, ignoring the latch.
    pub active: Severity,
    /// Last finite value evaluated.
    pub value: Option<f64>,
    pub alert_limit: Option<f64>,
    pub danger_limit: Option<f64>,
}

#[derive(Debug, Clone, Copy)]
struct Level {
    spec: LevelSpec,
    /// Schmitt-trigger condition.
    cond: bool,
    /// Qualified (delayed) state.
    active: bool,
    /// When `cond` started to differ from `active` in the current run.
    pending_since: Option<f64>,
}

impl Level {
    fn new(spec: LevelSpec) -> Level {
        Level {
            spec,
            cond: false,
            active: false,
            pending_since: None,
        }
    }

    fn reset(&mut self) {
        self.cond = false;
        self.active = false;
        self.pending_since = None;
    }

    /// A gap: keep the qualified state, forget whatever was pending.
    fn hold(&mut self) {
        self.cond = self.active;
        self.pending_since = None;
    }

    fn step(&mut self, now: f64, v: f64) {
        let Some(limit) = self.spec.limit else {
            self.reset();
            return;
        };
        let h = self.spec.hysteresis;
        self.cond = match (self.spec.direction, self.cond) {
            (Direction::High, false) => v >= limit,
            (Direction::High, true) => v >= limit - h,
            (Direction::Low, false) => v <= limit,
            (Direction::Low, true) => v <= limit + h,
        };
        if self.cond == self.active {
            self.pending_since = None;
            return;
        }
        let since = *self.pending_since.get_or_insert(now);
        let delay = if self.cond {
            self.spec.on_delay_s
        } else {
            self.spec.off_delay_s
        };
        if now - since >= delay {
            self.active = self.cond;
            self.pending_since = None;
        }
    }
}

/// The state machine of one alarm. See the module docs for the semantics.
#[derive(Debug, Clone)]
pub struct AlarmMachine {
    alert: Option<Level>,
    danger: Option<Level>,
    latching: bool,
    latched: Severity,
    acked: bool,
    inhibited: bool,
    state: AlarmState,
    since: f64,
    value: Option<f64>,
    transitions: [u64; 4],
    non_finite: u64,
}

impl AlarmMachine {
    /// A machine in the normal state since `now`.
    pub fn new(spec: &AlarmLevels, now: f64) -> AlarmMachine {
        AlarmMachine {
            alert: spec.alert.map(Level::new),
            danger: spec.danger.map(Level::new),
            latching: spec.latching,
            latched: Severity::Normal,
            acked: false,
            inhibited: false,
            state: AlarmState::Normal,
            since: now,
            value: None,
            transitions: [0; 4],
            non_finite: 0,
        }
    }

    /// Replaces the limits (a baseline finished learning, a reload). The
    /// levels keep their state and are judged against the new limits from
    /// the next evaluation; `None` disables a level and clears it.
    pub fn set_limits(&mut self, alert: Option<f64>, danger: Option<f64>) {
        for (level, limit) in [(&mut self.alert, alert), (&mut self.danger, danger)] {
            if let Some(l) = level {
                l.spec.limit = limit;
                if limit.is_none() {
                    l.reset();
                }
            }
        }
    }

    /// Restores the latch and its ack after a restart (from the journal).
    /// Ignored by a non-latching alarm. Produces no transition: the state
    /// shown is the restored latch, since `now`.
    pub fn restore(&mut self, memory: AlarmMemory, now: f64) {
        if !self.latching {
            return;
        }
        self.latched = memory.latched;
        self.acked = memory.acknowledged && memory.latched > Severity::Normal;
        let shown = self.shown();
        if shown != self.state {
            self.state = shown;
            self.since = now;
        }
    }

    /// What must survive a restart.
    pub fn memory(&self) -> AlarmMemory {
        AlarmMemory {
            latched: self.latched,
            acknowledged: self.acked,
        }
    }

    fn active(&self) -> Severity {
        let on = |l: &Option<Level>| l.as_ref().is_some_and(|l| l.active);
        if on(&self.danger) {
            Severity::Danger
        } else if on(&self.alert) {
            Severity::Alert
        } else {
            Severity::Normal
        }
    }

    fn shown(&self) -> AlarmState {
        if self.inhibited {
            AlarmState::Inhibited
        } else if self.latching {
            self.latched.max(self.active()).into()
        } else {
            self.active().into()
        }
    }

    fn levels(&mut self) -> impl Iterator<Item = &mut Level> {
        self.alert.iter_mut().chain(self.danger.iter_mut())
    }

    /// Evaluates one input at `now`. Returns the change of the shown state,
    /// if any (at most one per evaluation).
    pub fn evaluate(&mut self, now: f64, input: Input) -> Option<Transition> {
        let value = match input {
            Input::Value(v) if v.is_finite() => {
                self.inhibited = false;
                self.value = Some(v);
                for l in self.levels() {
                    l.step(now, v);
                }
                let a = self.active();
                if self.latching {
                    if a > self.latched {
                        self.latched = a;
                        self.acked = false;
                    } else if self.acked && a < self.latched {
                        self.latched = a;
                        if a == Severity::Normal {
                            self.acked = false;
                        }
                    }
                }
                Some(v)
            }
            Input::Value(_) | Input::NoData => {
                if matches!(input, Input::Value(_)) {
                    self.non_finite += 1;
                }
                for l in self.levels() {
                    l.hold();
                }
                None
            }
            Input::Inhibited => {
                self.inhibited = true;
                for l in self.levels() {
                    l.reset();
                }
                None
            }
        };
        self.change(now, value, None)
    }

    fn change(&mut self, now: f64, value: Option<f64>, cause: Option<Cause>) -> Option<Transition> {
        let to = self.shown();
        let from = self.state;
        if to == from {
            return None;
        }
        let cause = cause.unwrap_or(if to == AlarmState::Inhibited {
            Cause::Inhibit
        } else if from == AlarmState::Inhibited {
            Cause::Release
        } else if rank(to) > rank(from) {
            Cause::Trip
        } else {
            Cause::Clear
        });
        self.state = to;
        self.since = now;
        self.transitions[to.index()] += 1;
        Some(Transition {
            at: now,
            from,
            to,
            cause,
            value,
        })
    }

    /// An operator acknowledges the alarm (after the caller checked the
    /// token). See the module docs for what happens.
    ///
    /// # Errors
    /// [`AckError::NotLatching`] for a non-latching alarm,
    /// [`AckError::NotLatched`] when nothing is latched. Nothing changes.
    pub fn acknowledge(&mut self, now: f64) -> Result<AckOutcome, AckError> {
        if !self.latching {
            return Err(AckError::NotLatching);
        }
        if self.latched == Severity::Normal {
            return Err(AckError::NotLatched);
        }
        if self.acked {
            return Ok(AckOutcome::AlreadyAcknowledged);
        }
        let a = self.active();
        if a == Severity::Normal {
            self.latched = Severity::Normal;
            self.acked = false;
            let transition = self.change(now, None, Some(Cause::Ack));
            Ok(AckOutcome::Cleared { transition })
        } else {
            self.latched = a;
            self.acked = true;
            let transition = self.change(now, None, Some(Cause::Ack));
            Ok(AckOutcome::Acknowledged { transition })
        }
    }

    pub fn status(&self) -> AlarmStatus {
        let latched = self.latching && self.latched > Severity::Normal;
        AlarmStatus {
            state: self.state,
            latched,
            acknowledged: latched && self.acked,
            since: self.since,
            active: self.active(),
            value: self.value,
            alert_limit: self.alert.and_then(|l| l.spec.limit),
            danger_limit: self.danger.and_then(|l| l.spec.limit),
        }
    }

    pub fn state(&self) -> AlarmState {
        self.state
    }

    pub fn is_latching(&self) -> bool {
        self.latching
    }

    /// Transitions so far into each state, indexed like [`AlarmState::ALL`].
    pub fn transition_counts(&self) -> [u64; 4] {
        self.transitions
    }

    /// Non-finite values received (treated as no data).
    pub fn non_finite_inputs(&self) -> u64 {
        self.non_finite
    }
}

fn rank(s: AlarmState) -> i32 {
    match s {
        AlarmState::Inhibited => -1,
        AlarmState::Normal => 0,
        AlarmState::Alert => 1,
        AlarmState::Danger => 2,
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn level(limit: f64, h: f64, on: f64, off: f64) -> LevelSpec {
        LevelSpec {
            limit: Some(limit),
            direction: Direction::High,
            hysteresis: h,
            on_delay_s: on,
            off_delay_s: off,
        }
    }

    fn spec(latching: bool) -> AlarmLevels {
        AlarmLevels {
            alert: Some(level(4.5, 0.5, 0.0, 0.0)),
            danger: Some(level(7.1, 0.5, 0.0, 0.0)),
            latching,
        }
    }

    #[test]
    fn rises_and_falls_with_hysteresis() {
        let mut m = AlarmMachine::new(&spec(false), 0.0);
        assert_eq!(m.evaluate(1.0, Input::Value(4.4)), None);
        let t = m.evaluate(2.0, Input::Value(4.5)).unwrap();
        assert_eq!(
            (t.from, t.to, t.cause),
            (AlarmState::Normal, AlarmState::Alert, Cause::Trip)
        );
        // Inside the deadband: stays.
        assert_eq!(m.evaluate(3.0, Input::Value(4.1)), None);
        let t = m.evaluate(4.0, Input::Value(3.9)).unwrap();
        assert_eq!((t.to, t.cause), (AlarmState::Normal, Cause::Clear));
        let t = m.evaluate(5.0, Input::Value(8.0)).unwrap();
        assert_eq!(t.to, AlarmState::Danger);
    }

    #[test]
    fn on_delay_needs_continuous_condition() {
        let s = AlarmLevels {
            alert: Some(level(1.0, 0.0, 2.0, 0.0)),
            danger: None,
            latching: false,
        };
        let mut m = AlarmMachine::new(&s, 0.0);
        assert_eq!(m.evaluate(0.0, Input::Value(2.0)), None);
        assert_eq!(m.evaluate(1.5, Input::Value(2.0)), None);
        // A gap cancels the pending delay.
        assert_eq!(m.evaluate(1.9, Input::NoData), None);
        assert_eq!(m.evaluate(2.5, Input::Value(2.0)), None);
        assert_eq!(m.evaluate(4.0, Input::Value(2.0)), None);
        assert_eq!(
            m.evaluate(4.5, Input::Value(2.0)).unwrap().to,
            AlarmState::Alert
        );
    }

    #[test]
    fn latch_ack_semantics() {
        let mut m = AlarmMachine::new(&spec(true), 0.0);
        assert_eq!(m.acknowledge(0.0), Err(AckError::NotLatched));
        m.evaluate(1.0, Input::Value(8.0));
        m.evaluate(2.0, Input::Value(5.0));
        assert_eq!(m.state(), AlarmState::Danger);
        // Ack while alert persists: latch drops to alert, stays acked.
        let out = m.acknowledge(3.0).unwrap();
        assert!(matches!(out, AckOutcome::Acknowledged { .. }));
        assert_eq!(m.state(), AlarmState::Alert);
        assert!(m.status().acknowledged);
        assert_eq!(m.acknowledge(3.5), Ok(AckOutcome::AlreadyAcknowledged));
        // Clears by itself once the condition clears.
        assert_eq!(
            m.evaluate(4.0, Input::Value(1.0)).unwrap().to,
            AlarmState::Normal
        );
        assert!(!m.status().latched);
        // Unacked latch stays after the condition clears, until ack.
        m.evaluate(5.0, Input::Value(5.0));
        m.evaluate(6.0, Input::Value(1.0));
        assert_eq!(m.state(), AlarmState::Alert);
        let out = m.acknowledge(7.0).unwrap();
        assert!(matches!(
            out,
            AckOutcome::Cleared {
                transition: Some(_)
            }
        ));
        assert_eq!(m.state(), AlarmState::Normal);
    }

    #[test]
    fn inhibit_keeps_latch_and_resets_levels() {
        let mut m = AlarmMachine::new(&spec(true), 0.0);
        m.evaluate(1.0, Input::Value(5.0));
        let t = m.evaluate(2.0, Input::Inhibited).unwrap();
        assert_eq!((t.to, t.cause), (AlarmState::Inhibited, Cause::Inhibit));
        assert!(m.status().latched);
        let t = m.evaluate(3.0, Input::Value(1.0)).unwrap();
        assert_eq!((t.to, t.cause), (AlarmState::Alert, Cause::Release));
    }

    #[test]
    fn restore_brings_back_the_latch() {
        let mut m = AlarmMachine::new(&spec(true), 0.0);
        m.restore(
            AlarmMemory {
                latched: Severity::Danger,
                acknowledged: false,
            },
            0.0,
        );
        assert_eq!(m.state(), AlarmState::Danger);
        assert_eq!(m.evaluate(1.0, Input::Value(0.0)), None);
        assert_eq!(m.state(), AlarmState::Danger);
    }

    #[test]
    fn non_finite_is_no_data() {
        let mut m = AlarmMachine::new(&spec(false), 0.0);
        assert_eq!(m.evaluate(1.0, Input::Value(f64::NAN)), None);
        assert_eq!(m.evaluate(1.0, Input::Value(f64::INFINITY)), None);
        assert_eq!(m.non_finite_inputs(), 2);
        assert_eq!(m.state(), AlarmState::Normal);
    }
}
