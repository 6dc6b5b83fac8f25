//! bandwatch: a streaming daemon for live DAQ channels.
//!
//! Data flows one way:
//!
//! ```text
//! source (tokio task) -> ring (SPSC per channel) -> DSP worker (OS thread)
//!     -> published state (atomic swap) -> http (axum: JSON API, /metrics)
//!                                      \-> alarm engine -> journal, captures
//! ```
//!
//! Modules by layer; a module imports only from layers below its own
//! (`tests/layers.rs` checks it, DEVELOPERS.md explains it):
//!
//! | layer | modules |
//! |---|---|
//! | commands | [`daemon`] (the service), [`tools`] (send, record, replay, selftest, bench) |
//! | serving | [`http`]: router, JSON API, Prometheus exposition |
//! | assembly | [`pipeline`]: the one builder of rings, workers and alarm engines; the published state |
//! | stages | [`source`] (sockets, serial, the simulator), [`ring`], [`dsp`] (pure kernels), [`alarm`] |
//! | foundation | [`config`], [`frame`], [`counters`], [`units`], [`clock`], [`noise`], [`shutdown`] |

pub mod alarm;
pub mod clock;
pub mod config;
pub mod counters;
pub mod daemon;
pub mod dsp;
pub mod frame;
pub mod history;
pub mod http;
pub mod noise;
pub mod pipeline;
pub mod ring;
pub mod shutdown;
pub mod source;
pub mod tools;
pub mod units;

pub use daemon::serve;
pub use pipeline::{Pipeline, RunError};
