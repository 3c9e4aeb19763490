//! gaugewise: Kalman-filtered sensor signals with honest uncertainty and innovation-based fault flags.
//!
//! The numerical core (`model`, `filter`, `estimate`, `stats`, `transform`, `channel`) is pure and synchronous:
//! no IO, no clock, no logging. The offline bench (`fit`, `replay`) and, later, the daemon all drive it. `history`
//! and `config` read the bench's inputs; `report` formats what `fit` prints and `replay` runs a config over a history
//! through `channel`, the daemon's per-sample path.

pub mod broker;
pub mod channel;
pub mod checkpoint;
pub mod config;
pub mod demo;
pub mod detect;
pub mod estimate;
pub mod filter;
pub mod history;
pub mod html_report;
pub mod ingest;
pub mod model;
pub mod notify;
pub mod publish;
pub mod reestimate;
pub mod replay;
pub mod report;
pub mod runtime;
pub mod simulate;
pub mod stats;
pub mod transform;
