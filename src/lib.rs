#![warn(missing_docs)]
//! mtgauge: live machine-translation quality monitoring.
//!
//! Layers, each importing only the ones below it: `cli` (one file per command) and `client`
//! (the gRPC client side) -> `server` (gRPC services, the one shared state, the admin
//! listeners) -> `store` (durable state) and `session` (sessions, windows, batch apply) ->
//! `refs` (reference sets, compiled tables), `guard` (reference-free checks) and `external` (producers' own segment metrics) -> `metric` (statistics and the scores derived from
//! them) -> `text` (tokenizers); `pb` (the API and its conversions), `telemetry` (metric names
//! and recording) and `report` (renderings) serve the layers above them.
//!
//! The scoring core (`text`, `metric`, `refs`, `session`) is synchronous and free of I/O: no
//! async, no files, no network; `session` guards each session's state with a short std mutex.
pub mod affinity;
pub mod alerts;
pub mod cli;
pub mod client;
pub mod external;
pub mod guard;
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
