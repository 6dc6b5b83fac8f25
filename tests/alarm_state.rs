//! The alarm state machine against a reference model written here from the
//! semantics in `docs/alarms.md` (not from `src/alarm/state.rs`): the
//! reference finds each level's delay by scanning back over the history of
//! evaluations instead of running a timer. Plus chatter checks and
//! invariants that need no model.

#![allow(clippy::unwrap_used)] // tests may unwrap: a panic is a failed test

use bandwatch::alarm::state::{
    AckError, AckOutcome, AlarmLevels, AlarmMachine, AlarmState, Cause, Direction, Input,
    LevelSpec, Severity,
};
use proptest::prelude::*;

// ---------------------------------------------------------------------------
// Reference model
// ---------------------------------------------------------------------------

#[derive(Debug, Clone, Copy)]
struct RefLevel {
    limit: f64,
    high: bool,
    h: f64,
    on: f64,
    off: f64,
}

/// One evaluation as the reference records it for one level.
#[derive(Debug, Clone, Copy)]
struct Step {
    t: f64,
    /// A gap or an inhibit: no delay run crosses it.
    broken: bool,
    schmitt: bool,
}

#[derive(Debug, Default)]
struct RefLevelState {
    hist: Vec<Step>,
    qualified: bool,
}

impl RefLevelState {
    fn last_schmitt(&self) -> bool {
        self.hist.last().is_some_and(|s| s.schmitt)
    }

    fn value(&mut self, lvl: &RefLevel, t: f64, v: f64) {
        let over = if lvl.high {
            v >= lvl.limit
        } else {
            v <= lvl.limit
        };
        let back = if lvl.high {
            v < lvl.limit - lvl.h
        } else {
            v > lvl.limit + lvl.h
        };
        // After a break the trigger restarts from the qualified state.
        let prev = match self.hist.last() {
            Some(s) if s.broken => self.qualified,
            Some(_) => self.last_schmitt(),
            None => false,
        };
        let schmitt = if over {
            true
        } else if back {
            false
        } else {
            prev
        };
        self.hist.push(Step {
            t,
            broken: false,
            schmitt,
        });
        if schmitt == self.qualified {
            return;
        }
        // Scan back for the start of the run of evaluations that all wanted
        // `schmitt` (the qualified state cannot have changed inside it).
        let mut start = t;
        for s in self.hist.iter().rev() {
            if s.broken || s.schmitt != schmitt {
                break;
            }
            start = s.t;
        }
        let need = if schmitt { lvl.on } else { lvl.off };
        if t - start >= need {
            self.qualified = schmitt;
            // The run that qualified is used up: later evaluations start a
            // new one only if they want the opposite.
            self.hist.push(Step {
                t,
                broken: true,
                schmitt,
            });
        }
    }

    fn gap(&mut self, t: f64) {
        self.hist.push(Step {
            t,
            broken: true,
            schmitt: self.qualified,
        });
    }

    fn inhibit(&mut self, t: f64) {
        self.qualified = false;
        self.hist.push(Step {
            t,
            broken: true,
            schmitt: false,
        });
    }
}

struct Reference {
    alert: Option<RefLevel>,
    danger: Option<RefLevel>,
    latching: bool,
    a: RefLevelState,
    d: RefLevelState,
    inhibited: bool,
    latch: u8,
    acked: bool,
    shown: AlarmState,
}

fn shown_of(sev: u8) -> AlarmState {
    match sev {
        0 => AlarmState::Normal,
        1 => AlarmState::Alert,
        _ => AlarmState::Danger,
    }
}

impl Reference {
    fn live(&self) -> u8 {
        if self.danger.is_some() && self.d.qualified {
            2
        } else if self.alert.is_some() && self.a.qualified {
            1
        } else {
            0
        }
    }

    fn display(&self) -> AlarmState {
        if self.inhibited {
            AlarmState::Inhibited
        } else if self.latching {
            shown_of(self.latch.max(self.live()))
        } else {
            shown_of(self.live())
        }
    }

    fn eval(&mut self, t: f64, input: Input) -> Option<(AlarmState, AlarmState)> {
        match input {
            Input::Value(v) => {
                self.inhibited = false;
                if let Some(l) = self.alert {
                    self.a.value(&l, t, v);
                }
                if let Some(l) = self.danger {
                    self.d.value(&l, t, v);
                }
                let live = self.live();
                if self.latching {
                    if live > self.latch {
                        self.latch = live;
                        self.acked = false;
                    } else if self.acked && live < self.latch {
                        self.latch = live;
                        self.acked = live != 0;
                    }
                }
            }
            Input::NoData => {
                self.a.gap(t);
                self.d.gap(t);
            }
            Input::Inhibited => {
                self.inhibited = true;
                self.a.inhibit(t);
                self.d.inhibit(t);
            }
        }
        self.settle()
    }

    fn settle(&mut self) -> Option<(AlarmState, AlarmState)> {
        let now = self.display();
        if now == self.shown {
            None
        } else {
            let before = self.shown;
            self.shown = now;
            Some((before, now))
        }
    }

    /// Ok(true) = released, Ok(false) = recorded, Err(0) not latching,
    /// Err(1) nothing latched, Err(2) already acknowledged.
    fn ack(&mut self) -> (Result<bool, u8>, Option<(AlarmState, AlarmState)>) {
        if !self.latching {
            return (Err(0), None);
        }
        if self.latch == 0 {
            return (Err(1), None);
        }
        if self.acked {
            return (Err(2), None);
        }
        let live = self.live();
        let released = live == 0;
        self.latch = live;
        self.acked = !released;
        let change = self.settle();
        (Ok(released), change)
    }
}

// ---------------------------------------------------------------------------
// Generators
// ---------------------------------------------------------------------------

#[derive(Debug, Clone, Copy)]
enum Op {
    Eval(f64, Input),
    Ack(f64),
}

fn level_strategy(limit: f64) -> impl Strategy<Value = (LevelSpec, RefLevel)> {
    (
        any::<bool>(),
        prop::sample::select(vec![0.0, 0.5, 1.0, 2.0]),
        prop::sample::select(vec![0.0, 0.25, 1.0, 2.5]),
        prop::sample::select(vec![0.0, 0.25, 1.0, 2.5]),
    )
        .prop_map(move |(high, h, on, off)| {
            (
                LevelSpec {
                    limit: Some(limit),
                    direction: if high {
                        Direction::High
                    } else {
                        Direction::Low
                    },
                    hysteresis: h,
                    on_delay_s: on,
                    off_delay_s: off,
                },
                RefLevel {
                    limit,
                    high,
                    h,
                    on,
                    off,
                },
            )
        })
}

fn op_strategy() -> impl Strategy<Value = Op> {
    // Time steps in quarters of a second (exact in binary), values in
    // halves around the limits so that ties with the limits happen often.
    let dt = (1u32..=8).prop_map(|q| f64::from(q) * 0.25);
    prop_oneof![
        8 => (dt.clone(), 0u32..=24).prop_map(|(dt, v)| Op::Eval(dt, Input::Value(f64::from(v) * 0.5))),
        1 => dt.clone().prop_map(|dt| Op::Eval(dt, Input::NoData)),
        1 => dt.clone().prop_map(|dt| Op::Eval(dt, Input::Inhibited)),
        1 => dt.prop_map(Op::Ack),
    ]
}

/// A level as the machine and the reference see it.
type Level = Option<(LevelSpec, RefLevel)>;

fn case() -> impl Strategy<Value = (Level, Level, bool, Vec<Op>)> {
    (
        prop::option::weighted(0.8, level_strategy(5.0)),
        prop::option::weighted(0.8, level_strategy(8.0)),
        any::<bool>(),
        prop::collection::vec(op_strategy(), 1..200),
    )
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(2000))]

    #[test]
    fn machine_matches_reference((alert, danger, latching, ops) in case()) {
        let spec = AlarmLevels {
            alert: alert.map(|(s, _)| s),
            danger: danger.map(|(s, _)| s),
            latching,
        };
        let mut m = AlarmMachine::new(&spec, 0.0);
        let mut r = Reference {
            alert: alert.map(|(_, l)| l),
            danger: danger.map(|(_, l)| l),
            latching,
            a: RefLevelState::default(),
            d: RefLevelState::default(),
            inhibited: false,
            latch: 0,
            acked: false,
            shown: AlarmState::Normal,
        };
        let mut t = 0.0;
        for (i, op) in ops.iter().enumerate() {
            match *op {
                Op::Eval(dt, input) => {
                    t += dt;
                    let got = m.evaluate(t, input);
                    let want = r.eval(t, input);
                    prop_assert_eq!(got.map(|x| (x.from, x.to)), want, "step {} {:?} at t={}", i, op, t);
                    if let Some(x) = got {
                        // Only a value can trip; gaps and inhibits never do.
                        if x.cause == Cause::Trip {
                            prop_assert!(matches!(input, Input::Value(_)));
                        }
                        prop_assert_eq!(x.at, t);
                    }
                }
                Op::Ack(dt) => {
                    t += dt;
                    let got = m.acknowledge(t);
                    let (want, change) = r.ack();
                    match (got, want) {
                        (Ok(AckOutcome::Cleared { transition }), Ok(true))
                        | (Ok(AckOutcome::Acknowledged { transition }), Ok(false)) => {
                            prop_assert_eq!(transition.map(|x| (x.from, x.to)), change);
                        }
                        (Err(AckError::NotLatching), Err(0))
                        | (Err(AckError::NotLatched), Err(1))
                        | (Ok(AckOutcome::AlreadyAcknowledged), Err(2)) => {
                            prop_assert_eq!(change, None);
                        }
                        (g, w) => prop_assert!(false, "step {}: ack gave {:?}, reference {:?}", i, g, w),
                    }
                }
            }
            let st = m.status();
            prop_assert_eq!(st.state, r.shown, "step {}", i);
            prop_assert_eq!(st.latched, latching && r.latch > 0, "step {}", i);
            prop_assert_eq!(st.acknowledged, latching && r.latch > 0 && r.acked, "step {}", i);
        }
    }

    /// Without latching, delays or hysteresis the state is a pure function
    /// of the latest value: nothing else may leak in.
    #[test]
    fn memoryless_when_nothing_delays(values in prop::collection::vec(0.0f64..12.0, 1..100)) {
        let lvl = |limit| LevelSpec { limit: Some(limit), direction: Direction::High, hysteresis: 0.0, on_delay_s: 0.0, off_delay_s: 0.0 };
        let mut m = AlarmMachine::new(&AlarmLevels { alert: Some(lvl(5.0)), danger: Some(lvl(8.0)), latching: false }, 0.0);
        for (i, v) in values.iter().enumerate() {
            m.evaluate(i as f64, Input::Value(*v));
            let want = if *v >= 8.0 { AlarmState::Danger } else if *v >= 5.0 { AlarmState::Alert } else { AlarmState::Normal };
            prop_assert_eq!(m.state(), want);
        }
    }

    /// A trip with an on-delay D is preceded by at least D seconds of
    /// uninterrupted values at or beyond the limit.
    #[test]
    fn trips_only_after_a_full_on_delay(ops in prop::collection::vec(op_strategy(), 1..200)) {
        let d = 1.0;
        let lvl = LevelSpec { limit: Some(5.0), direction: Direction::High, hysteresis: 0.0, on_delay_s: d, off_delay_s: 0.0 };
        let mut m = AlarmMachine::new(&AlarmLevels { alert: Some(lvl), danger: None, latching: false }, 0.0);
        let mut t = 0.0;
        let mut run_start: Option<f64> = None;
        for op in ops {
            let Op::Eval(dt, input) = op else { continue };
            t += dt;
            run_start = match input {
                Input::Value(v) if v >= 5.0 => Some(run_start.unwrap_or(t)),
                _ => None,
            };
            if let Some(x) = m.evaluate(t, input) {
                if x.to == AlarmState::Alert && x.cause == Cause::Trip {
                    let s = run_start.expect("a trip needs a run of values over the limit");
                    prop_assert!(t - s >= d, "tripped after {} s", t - s);
                }
            }
        }
    }
}

// ---------------------------------------------------------------------------
// Chatter
// ---------------------------------------------------------------------------

/// Deterministic uniform noise in [-1, 1) (64-bit LCG, Knuth's MMIX
/// constants).
struct Lcg(u64);
impl Lcg {
    fn next(&mut self) -> f64 {
        self.0 = self
            .0
            .wrapping_mul(6364136223846793005)
            .wrapping_add(1442695040888963407);
        ((self.0 >> 11) as f64 / (1u64 << 53) as f64) * 2.0 - 1.0
    }
}

/// A value dithering ±0.3 around the alert limit 5.0, evaluated every
/// 0.1 s for 10 minutes. Returns the transitions.
fn dither(h: f64, on: f64, off: f64) -> Vec<(f64, AlarmState)> {
    let lvl = LevelSpec {
        limit: Some(5.0),
        direction: Direction::High,
        hysteresis: h,
        on_delay_s: on,
        off_delay_s: off,
    };
    let mut m = AlarmMachine::new(
        &AlarmLevels {
            alert: Some(lvl),
            danger: None,
            latching: false,
        },
        0.0,
    );
    let mut noise = Lcg(7);
    let mut out = Vec::new();
    for i in 1..=6000 {
        let t = f64::from(i) * 0.1;
        if let Some(x) = m.evaluate(t, Input::Value(5.0 + 0.3 * noise.next())) {
            out.push((t, x.to));
        }
    }
    out
}

#[test]
fn dither_without_protection_chatters() {
    // The control: with no deadband and no delays the noise toggles the
    // alarm hundreds of times, so the checks below can fail.
    assert!(dither(0.0, 0.0, 0.0).len() > 500);
}

#[test]
fn deadband_wider_than_the_noise_stops_chatter() {
    // Noise spans 0.6 peak to peak; a 0.7 deadband leaves one trip.
    let tr = dither(0.7, 0.0, 0.0);
    assert_eq!(tr.len(), 1, "{tr:?}");
    assert_eq!(tr[0].1, AlarmState::Alert);
}

#[test]
fn delays_bound_the_toggle_rate() {
    for (on, off) in [(0.3, 0.3), (0.5, 1.0), (2.0, 2.0)] {
        let tr = dither(0.0, on, off);
        // A trip needs `on` seconds over the limit, the clear after it
        // `off` seconds under: trips are at least on + off apart.
        let bound = 2 * ((600.0 / (on + off)) as usize + 1);
        assert!(tr.len() <= bound, "{} transitions > {bound}", tr.len());
        for w in tr.windows(2) {
            let gap = w[1].0 - w[0].0;
            let need = if w[1].1 == AlarmState::Normal {
                off
            } else {
                on
            };
            assert!(gap + 1e-9 >= need, "{w:?} closer than {need} s");
        }
        assert!(tr.len() < dither(0.0, 0.0, 0.0).len());
    }
}

// ---------------------------------------------------------------------------
// Gaps and inhibit
// ---------------------------------------------------------------------------

fn high(limit: f64, on: f64) -> LevelSpec {
    LevelSpec {
        limit: Some(limit),
        direction: Direction::High,
        hysteresis: 0.0,
        on_delay_s: on,
        off_delay_s: 0.0,
    }
}

#[test]
fn gaps_never_trip() {
    let mut m = AlarmMachine::new(
        &AlarmLevels {
            alert: Some(high(5.0, 0.0)),
            danger: Some(high(8.0, 0.0)),
            latching: true,
        },
        0.0,
    );
    for i in 0..1000 {
        assert_eq!(m.evaluate(f64::from(i), Input::NoData), None);
    }
    assert_eq!(m.state(), AlarmState::Normal);
}

#[test]
fn a_gap_restarts_the_on_delay() {
    let mut m = AlarmMachine::new(
        &AlarmLevels {
            alert: Some(high(5.0, 3.0)),
            danger: None,
            latching: false,
        },
        0.0,
    );
    m.evaluate(0.0, Input::Value(6.0));
    m.evaluate(2.0, Input::Value(6.0));
    m.evaluate(2.5, Input::NoData);
    // 3 s after the first value, but the run was broken by the gap.
    assert_eq!(m.evaluate(3.5, Input::Value(6.0)), None);
    assert_eq!(m.evaluate(6.0, Input::Value(6.0)), None);
    let x = m.evaluate(6.5, Input::Value(6.0)).unwrap();
    assert_eq!((x.to, x.cause), (AlarmState::Alert, Cause::Trip));
}

#[test]
fn inhibit_cancels_a_pending_trip_and_shows_inhibited() {
    let mut m = AlarmMachine::new(
        &AlarmLevels {
            alert: Some(high(5.0, 2.0)),
            danger: None,
            latching: false,
        },
        0.0,
    );
    m.evaluate(0.0, Input::Value(9.0));
    let x = m.evaluate(1.0, Input::Inhibited).unwrap();
    assert_eq!((x.from, x.to), (AlarmState::Normal, AlarmState::Inhibited));
    for i in 2..10 {
        assert_eq!(m.evaluate(f64::from(i), Input::Inhibited), None);
    }
    // Back: normal first, the on-delay starts over.
    let x = m.evaluate(10.0, Input::Value(9.0)).unwrap();
    assert_eq!((x.to, x.cause), (AlarmState::Normal, Cause::Release));
    assert_eq!(m.evaluate(11.0, Input::Value(9.0)), None);
    assert_eq!(
        m.evaluate(12.0, Input::Value(9.0)).unwrap().to,
        AlarmState::Alert
    );
}

#[test]
fn latched_alarm_restored_stays_until_ack() {
    let spec = AlarmLevels {
        alert: Some(high(5.0, 0.0)),
        danger: Some(high(8.0, 0.0)),
        latching: true,
    };
    let mut m = AlarmMachine::new(&spec, 0.0);
    m.evaluate(1.0, Input::Value(9.0));
    let mem = m.memory();
    assert_eq!(mem.latched, Severity::Danger);
    let mut again = AlarmMachine::new(&spec, 100.0);
    again.restore(mem, 100.0);
    assert_eq!(again.state(), AlarmState::Danger);
    for i in 0..50 {
        again.evaluate(101.0 + f64::from(i), Input::Value(1.0));
    }
    assert_eq!(again.state(), AlarmState::Danger);
    assert!(matches!(
        again.acknowledge(200.0),
        Ok(AckOutcome::Cleared { .. })
    ));
    assert_eq!(again.state(), AlarmState::Normal);
}
