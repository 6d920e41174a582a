//! Alert rules, their evaluation and their delivery.

pub mod deliver;
pub mod promql;
pub mod rules;
pub mod shift;
