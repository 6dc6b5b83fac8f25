//! Alarms: the state detection stage after the DSP (ISO 13374 calls it
//! "state detection"). This module owns everything that turns band values and
//! raw samples into alarm states and leaves a durable record behind:
//!
//! - [`state`]: the per-alarm state machine (alert/danger levels, hysteresis,
//!   on/off delays, latching, acknowledge, inhibit). Pure, no I/O.
//! - [`health`]: channel health ("not OK") from the raw samples: flatline,
//!   clipping, DC bias window, stale, too many gaps. Pure, no I/O.
//! - [`baseline`]: learning a band's normal level (mean, σ) and limits from
//!   it; JSON persistence with an atomic write.
//! - [`zones`]: vibration severity zone boundaries (ISO 20816-3, from memory)
//!   as guidance presets.
//! - [`journal`]: the append-only JSON-lines event journal (fsync per event,
//!   rotation, replay tolerant of a torn last line).
//! - [`capture`]: the per-channel history ring, the capture builder and the
//!   atomic capture store (BWF1 waveform + JSON metadata).
//! - [`token`]: the bearer token for operator actions, constant-time compare.
//! - [`config`]: the TOML tables (`[alarms]`, a band's `alarm`, a channel's
//!   `health`) and their validation.
//! - [`engine`]: one channel's alarms on its DSP thread (health, captures, commands).
//! - [`io`]: the I/O thread that owns the journal and the capture store, so
//!   that the DSP threads never touch a file.
//!
//! bandwatch is a monitoring tool, not a machinery protection or safety
//! system; see `docs/alarms.md`.

pub mod baseline;
pub mod capture;
pub mod engine;
mod fsutil;
pub mod health;
pub mod io;
pub mod journal;
pub mod state;
pub mod token;

pub use fsutil::safe_name;
