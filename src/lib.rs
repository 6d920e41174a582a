//! mtgauge: live machine-translation quality monitoring.
//!
//! The scoring core (`text`, `metric`, `refs`) is pure and synchronous: no I/O, no async.
pub mod cli;
pub mod client;
pub mod metric;
pub mod pb;
pub mod refs;
pub mod report;
pub mod rng;
pub mod server;
pub mod session;
pub mod store;
pub mod telemetry;
pub mod text;
