//! gaugewise: Kalman-filtered sensor signals with honest uncertainty and innovation-based fault flags.
//!
//! The numerical core (`model`, `filter`, `estimate`, `stats`, `transform`, `channel`) is pure and synchronous:
//! no IO, no clock, no logging. The offline bench (`fit`, `replay`) and, later, the daemon all drive it.

pub mod channel;
pub mod config;
pub mod estimate;
pub mod filter;
pub mod history;
pub mod model;
pub mod stats;
pub mod transform;
