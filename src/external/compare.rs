//! Two systems' external metric compared over the items both hold: the difference of their
//! means, a paired-bootstrap interval of it and an approximate-randomization p-value, made the
//! way [`crate::metric::compare`] makes them for the built-in metrics, with its weights, coins
//! and ranks.
//!
//! Input: per item its key ([`crate::metric::resample::segment_key`] of the item key, else of
//! the segment id) and the two systems' fixed-point values on it, as parallel slices.
//!
//! # Difference
//! `(sum_A - sum_B) / (n x 10^decimals)`: the exact integer difference of the two sums, divided
//! once.
//!
//! # Interval
//! Each system's replicate sums ([`super::replicates::ExternalReplicates`]: the Poisson weights
//! of the key, the same for A and B, so the replicates are paired by item); replicate r gives
//! `mean_A(r) - mean_B(r)` (the two weighted counts are equal), and the interval takes the
//! tail-symmetric ranks of those differences ([`symmetric_interval`]).
//!
//! # p-value
//! A trial swaps the two values of each item with probability 1/2 (the coins of
//! [`crate::metric::compare::swap_word`] for its key), which changes the difference of the sums
//! from S to `S - 2 D` (D the sum of `a_i - b_i` over the swapped items); c counts the trials
//! with `|S - 2 D| >= |S|`, exactly in integers, and p = `(c + 1) / (trials + 1)`. The trials
//! run on the engine of the built-in metrics ([`SwapRows`]), whose sums are i64: when the
//! differences add up beyond it (values near the declared limits over a very large window)
//! there is no p-value.

use serde::Serialize;

use super::replicates::ExternalReplicates;
use super::ItemValues;
use crate::metric::compare::{p_value, swap_base, symmetric_interval, CompareSettings, SwapRows, DIFFERENCE_METHOD};
use crate::metric::resample::Interval;

/// Why there is no comparison of a metric both sessions declare.
pub const NO_COMMON_ITEMS: &str = "nothing to compare: no item key is in both recent windows";
/// Why an external metric of session A is not compared with session B's.
pub const NOT_IN_B: &str = "session B does not declare this metric";
/// See [`NOT_IN_B`].
pub const DECLARED_OTHERWISE: &str = "session B declares this metric with other decimals or direction: its values are not comparable";

/// One session's external metrics for a comparison: per declared metric (in declaration
/// order), its spec and per key its latest fixed-point value, keys in the order they first
/// appear.
pub type WindowValues = Vec<(super::ExternalSpec, Vec<(u64, i64)>)>;

/// Each metric of `a`, in its order, compared with `b`'s metric of the same name over the keys
/// both hold (in `a`'s order), with why not when there is nothing to compare (empty when there
/// is a comparison).
pub fn compare_declared(a: &WindowValues, b: &WindowValues, settings: &CompareSettings, threads: usize) -> Vec<(super::ExternalSpec, ValueComparison, &'static str)> {
    let empty = compare_values(&[], &[], &[], 0, settings, 1);
    a.iter()
        .map(|(spec, va)| {
            let Some((other, vb)) = b.iter().find(|(o, _)| o.name == spec.name) else { return (spec.clone(), empty, NOT_IN_B) };
            if (other.decimals, other.higher_is_better) != (spec.decimals, spec.higher_is_better) {
                return (spec.clone(), empty, DECLARED_OTHERWISE);
            }
            let of_b: std::collections::HashMap<u64, i64> = vb.iter().copied().collect();
            let (mut keys, mut xa, mut xb) = (Vec::new(), Vec::new(), Vec::new());
            for (k, v) in va {
                if let Some(&w) = of_b.get(k) {
                    keys.push(*k);
                    xa.push(*v);
                    xb.push(w);
                }
            }
            let c = compare_values(&keys, &xa, &xb, spec.decimals, settings, threads);
            (spec.clone(), c, if keys.is_empty() { NO_COMMON_ITEMS } else { "" })
        })
        .collect()
}

/// One system's mean over the compared items, with its own interval.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct SideMean {
    /// Mean value.
    pub mean: f64,
    /// Percentile interval of the mean (the same replicates as the difference's).
    pub interval: Option<Interval>,
}

/// An external metric compared over the items both systems hold.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct ValueComparison {
    /// Items compared.
    pub items: u64,
    /// System A (None without items).
    pub a: Option<SideMean>,
    /// System B.
    pub b: Option<SideMean>,
    /// `mean_A - mean_B` (None without items).
    pub difference: Option<f64>,
    /// Paired-bootstrap interval of the difference.
    pub interval: Option<Interval>,
    /// Approximate-randomization p-value.
    pub p_value: Option<f64>,
    /// Trials run.
    pub trials: usize,
    /// c: the trials whose |difference| was at least the observed one.
    pub extreme_trials: usize,
}

/// Compare A's values `a[i]` with B's `b[i]` on the items with keys `keys` (parallel slices,
/// fixed point at `decimals`), on up to `threads` threads (results never depend on it).
pub fn compare_values(keys: &[u64], a: &[i64], b: &[i64], decimals: u32, settings: &CompareSettings, threads: usize) -> ValueComparison {
    assert!(keys.len() == a.len() && a.len() == b.len(), "one key and two values per item");
    let n = keys.len();
    let none = ValueComparison { items: 0, a: None, b: None, difference: None, interval: None, p_value: None, trials: 0, extreme_trials: 0 };
    if n == 0 {
        return none;
    }
    let scale = 10f64.powi(decimals as i32);
    let (sa, sb) = (a.iter().map(|&x| i128::from(x)).sum::<i128>(), b.iter().map(|&x| i128::from(x)).sum::<i128>());
    let mean = |s: i128| s as f64 / (n as f64 * scale);
    let reps = (settings.resamples > 0).then(|| {
        let mut w = Vec::new();
        let mut acc = |vals: &[i64]| {
            let mut r = ExternalReplicates::new(1, settings.resamples, settings.seed);
            for (k, &v) in keys.iter().zip(vals) {
                // One metric, values in range of a declaration: cannot overflow.
                let _ = r.add_in_place(*k, &ItemValues(vec![(0, v)]), &mut w);
            }
            r
        };
        (acc(a), acc(b))
    });
    let interval = reps.as_ref().and_then(|(ra, rb)| {
        let mut d: Vec<f64> = (0..settings.resamples)
            .filter_map(|r| {
                let ((c, x), (_, y)) = (ra.replicate(0, r)?, rb.replicate(0, r)?);
                (c > 0).then(|| (x - y) as f64 / (c as f64 * scale))
            })
            .collect();
        let resamples = d.len();
        let (low, high) = symmetric_interval(&mut d, settings.level)?;
        Some(Interval { level: settings.level, low, high, resamples, method: DIFFERENCE_METHOD, seed: settings.seed })
    });
    let extreme = (settings.trials > 0).then(|| randomization(keys, a, b, settings.seed, settings.trials, threads)).flatten();
    ValueComparison {
        items: n as u64,
        a: Some(SideMean { mean: mean(sa), interval: reps.as_ref().and_then(|(ra, _)| ra.interval(0, decimals, settings.level)) }),
        b: Some(SideMean { mean: mean(sb), interval: reps.as_ref().and_then(|(_, rb)| rb.interval(0, decimals, settings.level)) }),
        difference: Some(mean(sa - sb)),
        interval,
        p_value: extreme.map(|c| p_value(c, settings.trials)),
        trials: if extreme.is_some() { settings.trials } else { 0 },
        extreme_trials: extreme.unwrap_or(0),
    }
}

/// c of the module notes; None when the differences add up beyond i64.
fn randomization(keys: &[u64], a: &[i64], b: &[i64], seed: u64, trials: usize, threads: usize) -> Option<usize> {
    let (mut rows, mut bases) = (Vec::new(), Vec::new());
    let mut total: i128 = 0;
    for ((k, &x), &y) in keys.iter().zip(a).zip(b) {
        let d = i128::from(x) - i128::from(y);
        if d != 0 {
            total += d.abs();
            rows.push(i64::try_from(d).ok()?);
            bases.push(swap_base(*k, seed));
        }
    }
    if total > i128::from(i64::MAX) {
        return None;
    }
    let observed: i128 = rows.iter().map(|&d| i128::from(d)).sum();
    let swaps = SwapRows { rows: &rows, bases: &bases, width: 1 };
    let c = swaps.count_trials(trials, threads, 1, || (), |_, d, count| {
        count[0] += usize::from((observed - 2 * i128::from(d[0])).abs() >= observed.abs());
    });
    Some(c[0])
}
