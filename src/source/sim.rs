//! The built-in demo: cooling-water pump P2 (an invented plant, see the
//! README). A 4-pole motor at 1485 rpm drives a 7-vane pump; the pump's
//! drive-end bearing has an outer-race defect that grows over a 200 s cycle.
//!
//! The simulator makes time-domain samples as a 24-bit converter would
//! (±5 V full scale, 100 mV/g accelerometers), so they travel through the
//! same scaling, ring, DSP and alarms as samples from a socket. It is
//! deterministic for a seed and never shortcuts to spectra.
//!
//! Channel order (the `index` of a channel in the config):
//! 0 `motor-de`, 1 `pump-de`, 2 `pump-nde` (accelerometers, 100 mV/g),
//! 3 `tach` (a once-per-rev optical pick-up: 4 V for 10 % of a turn,
//! 0 V otherwise, into the same converter).

use std::f64::consts::PI;
use std::sync::atomic::Ordering;
use std::time::Duration;

use tokio::time::{Instant, MissedTickBehavior};

use crate::clock::unix_now_ns;
use crate::config::SourceKind;
use crate::counters::GapReason;
use crate::source::{note_frame, SourceContext};

/// Channels the scenario produces.
pub const CHANNELS: usize = crate::config::SIM_CHANNELS;
/// Index of the tachometer channel.
pub const TACH_INDEX: usize = 3;
/// Tach pulse height, volts.
pub const TACH_VOLTS: f64 = 4.0;
/// Shaft speed: 1485 rpm.
pub const SHAFT_HZ: f64 = 1485.0 / 60.0;
/// Impeller vanes.
pub const VANES: f64 = 7.0;
/// Outer-race defect frequency of the pump drive-end bearing, in orders
/// (9 elements, d = 8 mm, D = 40 mm, 0°: (9/2)(1 − 0.2) = 3.6).
pub const BPFO_ORDERS: f64 = 3.6;
/// Structural resonance rung by the bearing impacts.
pub const RESONANCE_HZ: f64 = 3200.0;
/// Converter: volts per count of a ±5 V, 24-bit converter.
pub const VOLTS_PER_COUNT: f64 = 5.0 / 8_388_608.0;
/// Accelerometer sensitivity, volts per g.
pub const SENSITIVITY_V_PER_G: f64 = 0.1;
/// Length of one defect-growth cycle, and the part of it spent growing.
pub const CYCLE_SECONDS: f64 = 200.0;
pub const GROWTH_SECONDS: f64 = 180.0;

const G_PER_MM_S_AT: fn(f64) -> f64 = |f| 2.0 * PI * f * 1e-3 / crate::units::STANDARD_GRAVITY;

use crate::noise::SplitMix64 as Rng;

/// A sinusoid with its own phase accumulator (cycles, wrapped to [0, 1)).
#[derive(Debug, Clone)]
struct Tone {
    step: f64,
    phase: f64,
    amp_g: f64,
}

impl Tone {
    fn new(freq_hz: f64, fs: f64, rms_mm_s: f64, rng: &mut Rng) -> Tone {
        Tone {
            step: freq_hz / fs,
            phase: rng.uniform(),
            amp_g: rms_mm_s * 2f64.sqrt() * G_PER_MM_S_AT(freq_hz),
        }
    }
    fn next(&mut self) -> f64 {
        let v = self.amp_g * (2.0 * PI * self.phase).sin();
        self.phase += self.step;
        if self.phase >= 1.0 {
            self.phase -= 1.0;
        }
        v
    }
}

/// Generates the scenario, one instant at a time.
#[derive(Debug, Clone)]
pub struct PumpSim {
    fs: f64,
    n: u64,
    rng: Rng,
    motor: [Tone; 2],
    pump_de: [Tone; 2],
    pump_nde: [Tone; 2],
    noise_g: [f64; CHANNELS],
    /// Time of the next bearing impact, s.
    next_impact: f64,
    /// Active ringing impacts: (start time s, amplitude g).
    ringing: Vec<(f64, f64)>,
    /// Shaft angle in turns, for the tach.
    shaft: f64,
}

/// Decay time constant of the resonance rung by an impact.
const RING_TAU_S: f64 = 0.0012;

impl PumpSim {
    pub fn new(fs: f64, seed: u64) -> PumpSim {
        let mut rng = Rng(seed ^ 0x0050_325f_7075_6d70); // "P2_pump"
        let x1 = SHAFT_HZ;
        let vp = VANES * SHAFT_HZ;
        PumpSim {
            fs,
            n: 0,
            motor: [
                Tone::new(x1, fs, 2.2, &mut rng),
                Tone::new(2.0 * x1, fs, 0.6, &mut rng),
            ],
            pump_de: [
                Tone::new(x1, fs, 1.6, &mut rng),
                Tone::new(vp, fs, 1.8, &mut rng),
            ],
            pump_nde: [
                Tone::new(x1, fs, 1.4, &mut rng),
                Tone::new(vp, fs, 1.1, &mut rng),
            ],
            noise_g: [0.02, 0.03, 0.025, 0.0],
            next_impact: 0.0,
            ringing: Vec::with_capacity(8),
            shaft: 0.0,
            rng,
        }
    }

    /// Defect severity 0..1 at time `t` s: grows with the square of time
    /// over `GROWTH_SECONDS`, holds, and starts over every `CYCLE_SECONDS`.
    pub fn severity(t: f64) -> f64 {
        let c = t.rem_euclid(CYCLE_SECONDS);
        (c / GROWTH_SECONDS).min(1.0).powi(2)
    }

    /// Peak acceleration of one bearing impact at time `t`, g.
    pub fn impact_amplitude_g(t: f64) -> f64 {
        0.02 + 3.0 * Self::severity(t)
    }

    /// Next instant: g for the accelerometers, volts for the tach.
    pub fn next_instant(&mut self) -> [f64; CHANNELS] {
        let t = self.n as f64 / self.fs;
        self.n += 1;
        let motor = self.motor[0].next() + self.motor[1].next();
        let nde = self.pump_nde[0].next() + self.pump_nde[1].next();
        let mut de = self.pump_de[0].next() + self.pump_de[1].next();

        // Outer-race impacts at BPFO with ±0.5 % timing jitter (slip).
        while self.next_impact <= t {
            let amp = Self::impact_amplitude_g(self.next_impact);
            self.ringing.push((self.next_impact, amp));
            let period = 1.0 / (BPFO_ORDERS * SHAFT_HZ);
            self.next_impact += period * (1.0 + 0.005 * (2.0 * self.rng.uniform() - 1.0));
        }
        self.ringing.retain(|(t0, _)| t - t0 < 8.0 * RING_TAU_S);
        for &(t0, amp) in &self.ringing {
            let dt = t - t0;
            de += amp * (-dt / RING_TAU_S).exp() * (2.0 * PI * RESONANCE_HZ * dt).sin();
        }

        let tach = if self.shaft < 0.1 { TACH_VOLTS } else { 0.0 };
        self.shaft += SHAFT_HZ / self.fs;
        if self.shaft >= 1.0 {
            self.shaft -= 1.0;
        }
        let mut out = [motor, de, nde, tach];
        for (v, sd) in out.iter_mut().zip(self.noise_g) {
            *v += sd * self.rng.normal();
        }
        out
    }

    /// Fills `out` with interleaved 24-bit converter counts.
    pub fn fill_counts(&mut self, out: &mut [i32]) {
        const FULL: f64 = 8_388_607.0;
        for instant in out.chunks_exact_mut(CHANNELS) {
            let g = self.next_instant();
            for (c, (dst, v)) in instant.iter_mut().zip(g).enumerate() {
                let volts = if c == TACH_INDEX {
                    v
                } else {
                    v * SENSITIVITY_V_PER_G
                };
                let counts = (volts / VOLTS_PER_COUNT).round();
                *dst = counts.clamp(-FULL - 1.0, FULL) as i32;
            }
        }
    }
}

/// Most instants generated in one go.
const CHUNK: usize = 2048;

/// Plays the scenario in (scaled) real time until shutdown.
pub async fn run(ctx: SourceContext) {
    let SourceContext {
        spec,
        outputs: mut out,
        counters: state,
        mut shutdown,
    } = ctx;
    let SourceKind::Sim { seed, speed } = spec.kind else {
        tracing::error!(source = %spec.name, kind = spec.kind.as_str(), "not a sim source");
        return;
    };
    let fs = spec.sample_rate_hz;
    let mut sim = PumpSim::new(fs, seed);
    let mut buf = vec![0i32; CHUNK * CHANNELS];
    let start = Instant::now();
    let start_ns = unix_now_ns();
    let mut sent: u64 = 0;
    let mut tick = tokio::time::interval(Duration::from_millis(10));
    tick.set_missed_tick_behavior(MissedTickBehavior::Delay);
    state.connected.store(true, Ordering::Relaxed);
    out.mark_discontinuity(GapReason::Restart);
    tracing::info!(source = %state.name, seed, speed, "sim source started (scenario p2-pump)");
    loop {
        tokio::select! {
            _ = tick.tick() => {}
            _ = shutdown.recv() => break,
        }
        if shutdown.is_shutdown() {
            break;
        }
        let due = (start.elapsed().as_secs_f64() * fs * speed) as u64;
        while sent < due {
            let n = ((due - sent) as usize).min(CHUNK);
            let frame = &mut buf[..n * CHANNELS];
            sim.fill_counts(frame);
            let ts = start_ns + (sent as f64 * 1e9 / fs) as u64;
            out.write_interleaved(sent, ts, frame);
            note_frame(&state);
            state
                .bytes
                .fetch_add((frame.len() * 3) as u64, Ordering::Relaxed);
            sent += n as u64;
        }
        out.wake();
    }
    state.connected.store(false, Ordering::Relaxed);
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::config::SourceSpec;
    use crate::source::SourceOutputs;

    /// The task reads everything from its context, reports itself
    /// connected while it plays, and ends when the signal is triggered.
    #[tokio::test]
    async fn plays_until_shutdown_from_its_context() {
        let spec = SourceSpec {
            name: "p2".to_string(),
            sample_rate_hz: 25_600.0,
            channels: CHANNELS,
            kind: SourceKind::Sim {
                seed: 3,
                speed: 1.0,
            },
            sequence: crate::config::SequenceSpec::DEFAULT,
        };
        let (ctx, signal) = SourceContext::new_test(spec, SourceOutputs::new(CHANNELS));
        let counters = ctx.counters.clone();
        assert_eq!((counters.name.as_str(), counters.kind), ("p2", "sim"));
        let task = tokio::spawn(run(ctx));
        let deadline = std::time::Instant::now() + Duration::from_secs(10);
        while counters.frames.load(Ordering::Relaxed) == 0 {
            assert!(std::time::Instant::now() < deadline, "no frame in 10 s");
            tokio::time::sleep(Duration::from_millis(10)).await;
        }
        assert!(counters.is_connected());
        signal.trigger();
        let ended = tokio::time::timeout(Duration::from_secs(10), task).await;
        assert!(matches!(ended, Ok(Ok(()))), "{ended:?}");
        assert!(!counters.is_connected());
        // 3 bytes counted per 24-bit sample, whole instants only.
        assert_eq!(
            counters.bytes.load(Ordering::Relaxed) % (3 * CHANNELS as u64),
            0
        );
    }

    #[test]
    fn same_seed_same_samples() {
        let mut a = PumpSim::new(25_600.0, 9);
        let mut b = PumpSim::new(25_600.0, 9);
        let (mut x, mut y) = (vec![0; 3000], vec![0; 3000]);
        a.fill_counts(&mut x);
        b.fill_counts(&mut y);
        assert_eq!(x, y);
    }

    #[test]
    fn scenario_frequencies() {
        // README "What the demo shows": 1485 rpm -> 24.75 Hz, 7 vanes -> 173.25 Hz, BPFO 89.1 Hz.
        assert!((SHAFT_HZ - 24.75).abs() < 1e-12);
        assert!((VANES * SHAFT_HZ - 173.25).abs() < 1e-9);
        assert!((BPFO_ORDERS * SHAFT_HZ - 89.1).abs() < 1e-9);
    }

    #[test]
    fn defect_grows_then_restarts() {
        assert!(PumpSim::severity(0.0) < 1e-9);
        assert!(PumpSim::severity(90.0) > 0.2);
        assert!((PumpSim::severity(190.0) - 1.0).abs() < 1e-9);
        assert!(PumpSim::severity(201.0) < 1e-3);
    }
}
