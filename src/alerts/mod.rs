//! Alert rules, their evaluation and their delivery.

pub mod rules;
