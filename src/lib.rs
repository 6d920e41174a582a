//! mtgauge: live machine-translation quality monitoring.
//!
//! The scoring core (`text`, `metric`, `refs`) is pure and synchronous: no I/O, no async.
pub mod cli;
pub mod demo;
pub mod metric;
pub mod refs;
pub mod report;
pub mod rng;
pub mod text;
