//! Signal processing: pure functions and per-channel state that turn blocks
//! of samples into spectra, band values and overall levels. Nothing here
//! touches sockets, files or HTTP.
//!
//! - `window`: analysis windows and their figures of merit
//! - `spectrum`: block → single-sided power spectrum (plan made once)
//! - `average`: linear, exponential and peak-hold averaging
//! - `bands`: band RMS / peak from a spectrum, with unit conversion and
//!   integration
//! - `stats`: time-domain overall levels
//! - `trend`: Theil–Sen slope, Mann–Kendall test, time to a limit
//! - `orders`: bearing defect frequencies in orders of running speed
//! - `speed`: running speed from a tach pulse train or a tracked peak
//! - `envelope`: band-pass + analytic signal → envelope (demodulation)
//! - `filter`: band-limited time signal of a block (for the waveform API)
//! - `simd`: run-time choice of vector instructions for the hot loops
//! - `worker`: the OS threads that own channels and run the above

pub mod average;
pub mod bands;
pub mod envelope;
pub mod filter;
pub mod simd;
pub mod spectrum;
pub mod speed;
pub mod stats;
pub mod trend;
pub mod window;
