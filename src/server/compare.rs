//! Two sessions compared over the segments both `recent` windows hold: what the `Compare` call
//! answers and what the alert rules of kind `drop` judge by.

use std::collections::HashMap;

use super::error::{Result, ServiceError};
use crate::metric::compare::{compare, CompareSettings, Comparison};
use crate::metric::SegmentStats;
use crate::session::Session;

/// A comparison of two sessions' windows.
#[derive(Debug, Clone)]
pub struct Paired {
    /// Over the segments in both windows.
    pub comparison: Comparison,
    /// Segments in A's window, and in B's (each segment once).
    pub recent_a: u64,
    /// See `recent_a`.
    pub recent_b: u64,
}

/// Compare session `a` with session `b` (CPU work: call from a blocking thread). They must
/// score against the same reference-set version with the same configuration.
pub fn paired(a: &Session, b: &Session, settings: &CompareSettings, threads: usize) -> Result<Paired> {
    if a.refs().digest() != b.refs().digest() {
        return Err(ServiceError::NotComparable(format!(
            "sessions '{}' and '{}' score against different reference-set versions ({} and {}): their segments cannot be paired",
            a.spec().name,
            b.spec().name,
            &a.refs().digest_hex()[..16],
            &b.refs().digest_hex()[..16]
        )));
    }
    if a.spec().config != b.spec().config {
        return Err(ServiceError::NotComparable(format!(
            "sessions '{}' and '{}' use different configurations ({} vs {}): their scores are not comparable",
            a.spec().name,
            b.spec().name,
            a.spec().config.describe(),
            b.spec().config.describe()
        )));
    }
    let (in_a, in_b) = (a.recent_segments(), b.recent_segments());
    let of_b: HashMap<u64, &SegmentStats> = in_b.iter().map(|(k, s)| (*k, s)).collect();
    let (mut keys, mut sa, mut sb) = (Vec::new(), Vec::new(), Vec::new());
    for (k, s) in &in_a {
        if let Some(t) = of_b.get(k) {
            keys.push(*k);
            sa.push(*s);
            sb.push(**t);
        }
    }
    let comparison = compare(&a.spec().config, &keys, &sa, &sb, settings, threads);
    Ok(Paired { comparison, recent_a: in_a.len() as u64, recent_b: in_b.len() as u64 })
}
