//! Channel health: a flatlined, a clipped, a biased, a disconnected (stale)
//! and a gappy channel each become not OK, inhibit their band alarms, and
//! come back only after the recovery delay. Thresholds follow the common
//! practice noted in shared REFERENCES ("Sensors and data quality": flatline
//! std below ~1 LSB for >= 1 s; clipping at 0.99 of full scale; IEPE bias
//! window about 2 to 20 V) [cp].

#![allow(clippy::unwrap_used)] // tests may unwrap: a panic is a failed test

use bandwatch::alarm::health::{
    BiasSpec, ClippingSpec, FlatlineSpec, GapSpec, HealthDetector, HealthSpec, Reason, StaleSpec,
};
use bandwatch::alarm::state::{AlarmLevels, AlarmMachine, AlarmState, Direction, Input, LevelSpec};

const FS: f64 = 1000.0;
/// Samples per feed: 50 ms, not a multiple of the 0.1 s evaluation window.
const CHUNK: usize = 50;

fn spec() -> HealthSpec {
    HealthSpec {
        flatline: Some(FlatlineSpec {
            std_below: 1e-3,
            for_s: 1.0,
        }),
        clipping: Some(ClippingSpec {
            full_scale: 5.0,
            fraction: 0.99,
            samples: 3,
        }),
        bias: None,
        stale: Some(StaleSpec { after_s: 2.0 }),
        gaps: Some(GapSpec {
            max: 3,
            window_s: 10.0,
        }),
        recover_s: 2.0,
    }
}

/// Drives a detector and a band alarm together as the worker will: the
/// band alarm gets `Inhibited` while the channel is not OK.
struct Rig {
    h: HealthDetector,
    alarm: AlarmMachine,
    t: f64,
    n: u64,
}

impl Rig {
    fn new(spec: HealthSpec) -> Rig {
        let lvl = LevelSpec {
            limit: Some(0.5),
            direction: Direction::High,
            hysteresis: 0.0,
            on_delay_s: 0.0,
            off_delay_s: 0.0,
        };
        Rig {
            h: HealthDetector::new(spec, FS, 0.0),
            alarm: AlarmMachine::new(
                &AlarmLevels {
                    alert: Some(lvl),
                    danger: None,
                    latching: false,
                },
                0.0,
            ),
            t: 0.0,
            n: 0,
        }
    }

    /// Feeds `secs` of `f(t)` in chunks; the band "value" is the chunk RMS.
    fn run(&mut self, secs: f64, f: impl Fn(f64) -> f64) {
        let chunks = (secs * FS / CHUNK as f64).round() as usize;
        let mut buf = [0f32; CHUNK];
        for _ in 0..chunks {
            for s in buf.iter_mut() {
                *s = f(self.n as f64 / FS) as f32;
                self.n += 1;
            }
            self.t = self.n as f64 / FS;
            self.h.feed(self.t, &buf);
            let rms =
                (buf.iter().map(|x| f64::from(*x).powi(2)).sum::<f64>() / CHUNK as f64).sqrt();
            self.eval(Input::Value(rms));
        }
    }

    fn eval(&mut self, value: Input) {
        let input = if self.h.is_ok() {
            value
        } else {
            Input::Inhibited
        };
        self.alarm.evaluate(self.t, input);
    }

    /// Time passes without samples.
    fn silence(&mut self, secs: f64) {
        let steps = (secs * 10.0).round() as usize;
        for _ in 0..steps {
            self.t += 0.1;
            self.h.tick(self.t);
            self.eval(Input::NoData);
        }
    }
}

fn sine(a: f64) -> impl Fn(f64) -> f64 {
    move |t| a * (2.0 * std::f64::consts::PI * 24.75 * t).sin()
}

#[test]
fn starts_not_ok_until_data_and_recovery_delay() {
    let mut r = Rig::new(spec());
    assert!(!r.h.is_ok());
    assert!(r.h.state().reasons.contains(Reason::NoData));
    r.run(1.9, sine(0.1));
    assert!(!r.h.is_ok(), "recovery delay is 2 s");
    r.run(0.2, sine(0.1));
    assert!(r.h.is_ok());
    assert_eq!(r.alarm.state(), AlarmState::Normal);
}

#[test]
fn flatline_is_not_ok_and_inhibits() {
    let mut r = Rig::new(spec());
    r.run(3.0, sine(1.0));
    assert!(r.h.is_ok());
    assert_eq!(r.alarm.state(), AlarmState::Alert, "0.707 RMS is over 0.5");
    // The sensor dies at a constant level.
    r.run(0.8, |_| 0.25);
    assert!(r.h.is_ok(), "flat for less than 1 s");
    r.run(0.4, |_| 0.25);
    assert!(!r.h.is_ok());
    assert!(r.h.state().reasons.contains(Reason::Flatline));
    assert_eq!(r.alarm.state(), AlarmState::Inhibited);
    // Signal back: OK only after 2 s without a fault.
    r.run(1.5, sine(0.1));
    assert!(!r.h.is_ok());
    assert_eq!(r.alarm.state(), AlarmState::Inhibited);
    r.run(1.0, sine(0.1));
    assert!(r.h.is_ok());
    assert_eq!(r.alarm.state(), AlarmState::Normal);
}

#[test]
fn noise_below_one_step_counts_as_flat_but_a_signal_does_not() {
    // Control for the threshold: a live signal with 1e-2 noise is not flat.
    let mut r = Rig::new(spec());
    r.run(5.0, |t| 1e-2 * (t * 1234.5).sin());
    assert!(r.h.is_ok());
    r.run(2.0, |t| 1e-4 * (t * 1234.5).sin());
    assert!(!r.h.is_ok());
}

#[test]
fn clipping_is_not_ok_and_inhibits() {
    let mut r = Rig::new(spec());
    r.run(3.0, sine(4.0));
    assert!(r.h.is_ok(), "a 4.0 peak in a 5.0 full scale is fine");
    assert_eq!(r.alarm.state(), AlarmState::Alert);
    // Overdriven: the converter saturates at full scale.
    r.run(0.5, |t| {
        (6.0 * (2.0 * std::f64::consts::PI * 24.75 * t).sin()).clamp(-5.0, 5.0)
    });
    assert!(!r.h.is_ok());
    assert!(r.h.state().reasons.contains(Reason::Clipping));
    assert_eq!(r.alarm.state(), AlarmState::Inhibited);
    assert!(r.h.last_window().clipped >= 3);
}

#[test]
fn bias_out_of_window_is_not_ok() {
    let mut s = spec();
    s.bias = Some(BiasSpec { lo: 2.0, hi: 20.0 });
    s.clipping = None;
    let mut r = Rig::new(s);
    r.run(3.0, |t| 11.0 + sine(0.1)(t));
    assert!(r.h.is_ok());
    assert!((r.h.last_window().mean - 11.0).abs() < 0.01);
    // Open circuit: the supply's compliance voltage.
    r.run(0.2, |t| 23.5 + sine(0.1)(t));
    assert!(!r.h.is_ok());
    assert!(r.h.state().reasons.contains(Reason::Bias));
    // Short: near 0 V.
    r.run(3.0, |t| 11.0 + sine(0.1)(t));
    assert!(r.h.is_ok());
    r.run(0.2, |t| 0.3 + sine(0.1)(t));
    assert!(!r.h.is_ok());
}

#[test]
fn disconnected_channel_goes_stale_and_inhibits() {
    let mut r = Rig::new(spec());
    r.run(3.0, sine(1.0));
    assert_eq!(r.alarm.state(), AlarmState::Alert);
    r.silence(1.9);
    assert!(r.h.is_ok(), "stale after 2 s");
    assert_eq!(r.alarm.state(), AlarmState::Alert, "a gap holds the state");
    r.silence(0.2);
    assert!(!r.h.is_ok());
    assert!(r.h.state().reasons.contains(Reason::Stale));
    assert_eq!(r.alarm.state(), AlarmState::Inhibited);
}

#[test]
fn too_many_gaps_is_not_ok_and_expires() {
    let mut r = Rig::new(spec());
    r.run(3.0, sine(0.1));
    for _ in 0..3 {
        r.h.gap(r.t);
        r.run(0.5, sine(0.1));
    }
    assert!(r.h.is_ok(), "3 gaps is the maximum allowed");
    r.h.gap(r.t);
    r.eval(Input::NoData);
    assert!(!r.h.is_ok());
    assert!(r.h.state().reasons.contains(Reason::Gaps));
    // The window slides past the gaps (10 s), then 2 s to recover.
    r.run(9.0, sine(0.1));
    assert!(!r.h.is_ok());
    r.run(3.5, sine(0.1));
    assert!(r.h.is_ok());
}

#[test]
fn a_gap_never_trips_a_level() {
    // Value just under the limit, gaps in between: never alert.
    let mut r = Rig::new(spec());
    r.run(3.0, sine(0.6));
    assert_eq!(r.alarm.state(), AlarmState::Normal, "0.42 RMS < 0.5");
    for _ in 0..3 {
        r.h.gap(r.t);
        r.silence(0.5);
        r.run(0.5, sine(0.6));
    }
    assert_eq!(r.alarm.state(), AlarmState::Normal);
    assert_eq!(r.alarm.transition_counts()[1], 0);
}

#[test]
fn chunking_does_not_change_the_verdict() {
    // The same samples fed in chunks of 7 and of 333 give the same health.
    let samples: Vec<f32> = (0..5000)
        .map(|i| {
            if i < 2500 {
                (f64::from(i) * 0.3).sin() as f32
            } else {
                0.5
            }
        })
        .collect();
    let mut verdicts = Vec::new();
    for chunk in [7usize, 333] {
        let mut h = HealthDetector::new(spec(), FS, 0.0);
        let mut n = 0usize;
        for c in samples.chunks(chunk) {
            n += c.len();
            h.feed(n as f64 / FS, c);
        }
        verdicts.push((h.is_ok(), h.state().reasons, h.last_window()));
    }
    assert_eq!(verdicts[0].0, verdicts[1].0);
    assert_eq!(verdicts[0].1, verdicts[1].1);
    assert!(verdicts[0].1.contains(Reason::Flatline));
}
