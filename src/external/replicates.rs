//! Bootstrap replicates of external metric means: the session's Poisson weights
//! ([`crate::metric::resample::fill_weights`]) applied to each item's fixed-point values.
//!
//! Per metric and replicate r: the weighted count `sum_i w_ir` and the weighted sum
//! `sum_i w_ir x_i` (x in fixed point). Replicate r's mean is their ratio; the interval of the
//! mean is the percentile interval of the replicate means
//! ([`crate::metric::resample::percentile_interval`], Efron & Tibshirani 1993, ch. 13).
//!
//! The weights of an item come from its key: the reference-set segment id when the item matched
//! a segment, otherwise a key the producer gave the item ([`crate::metric::resample::segment_key`]
//! of its bytes either way), so every process, shard and replica gives an item the same weights
//! and the sums add up exactly (integers) over any split of the items.

use crate::metric::resample::{fill_weights, percentile_interval, Interval, METHOD};

use super::{ItemValues, SumError};

/// Replicate counts and sums of every declared external metric.
#[derive(Debug, Clone, PartialEq, Eq, serde::Serialize, serde::Deserialize)]
pub struct ExternalReplicates {
    resamples: usize,
    seed: u64,
    metrics: usize,
    /// Metric-major: `counts[m * resamples + r]`.
    counts: Vec<u64>,
    /// Metric-major, like `counts`.
    sums: Vec<i128>,
}

impl ExternalReplicates {
    /// Empty sums for `metrics` metrics, `resamples` replicates, weights under `seed`.
    pub fn new(metrics: usize, resamples: usize, seed: u64) -> ExternalReplicates {
        ExternalReplicates { resamples, seed, metrics, counts: vec![0; metrics * resamples], sums: vec![0; metrics * resamples] }
    }

    /// Replicates kept.
    pub fn resamples(&self) -> usize {
        self.resamples
    }

    /// Seed of the weights.
    pub fn seed(&self) -> u64 {
        self.seed
    }

    /// Whether these are sums of `metrics` metrics over `resamples` replicates under `seed`
    /// (a copy read back from a store).
    pub fn fits(&self, metrics: usize, resamples: usize, seed: u64) -> bool {
        (self.metrics, self.resamples, self.seed) == (metrics, resamples, seed) && self.counts.len() == metrics * resamples && self.sums.len() == metrics * resamples
    }

    /// Whether nothing has been added.
    pub fn is_empty(&self) -> bool {
        self.counts.iter().all(|&c| c == 0)
    }

    /// Add one item's values with the weights of `key`; `weights` is scratch space (resized).
    /// Nothing changes on overflow.
    pub fn add(&mut self, key: u64, item: &ItemValues, weights: &mut Vec<u8>) -> Result<(), SumError> {
        let mut next = self.clone();
        next.add_in_place(key, item, weights)?;
        *self = next;
        Ok(())
    }

    /// [`ExternalReplicates::add`] without the copy that keeps it whole on error: for scratch
    /// sums that are dropped on error (a batch's, a window's next sums).
    pub fn add_in_place(&mut self, key: u64, item: &ItemValues, weights: &mut Vec<u8>) -> Result<(), SumError> {
        self.apply::<true>(key, item, weights)
    }

    /// Take out one item's values added before with the same key (an item leaving a window),
    /// in place: on error the sums are partly changed, so call it on scratch sums.
    pub fn subtract_in_place(&mut self, key: u64, item: &ItemValues, weights: &mut Vec<u8>) -> Result<(), SumError> {
        self.apply::<false>(key, item, weights)
    }

    fn apply<const ADD: bool>(&mut self, key: u64, item: &ItemValues, weights: &mut Vec<u8>) -> Result<(), SumError> {
        if item.0.iter().any(|&(m, _)| m >= self.metrics) {
            return Err(SumError::Mismatch);
        }
        weights.resize(self.resamples, 0);
        fill_weights(key, self.seed, weights);
        for &(m, f) in &item.0 {
            let base = m * self.resamples;
            let f = i128::from(f);
            for (r, &w) in weights.iter().enumerate() {
                let (c, s) = (&mut self.counts[base + r], &mut self.sums[base + r]);
                let (nc, ns) = if ADD { (c.checked_add(u64::from(w)), s.checked_add(i128::from(w) * f)) } else { (c.checked_sub(u64::from(w)), s.checked_sub(i128::from(w) * f)) };
                *c = nc.ok_or(SumError::Overflow { count: *c })?;
                *s = ns.ok_or(SumError::Overflow { count: *c })?;
            }
        }
        Ok(())
    }

    fn same_shape(&self, o: &ExternalReplicates) -> Result<(), SumError> {
        if (self.resamples, self.seed, self.metrics) == (o.resamples, o.seed, o.metrics) {
            Ok(())
        } else {
            Err(SumError::Mismatch)
        }
    }

    /// Add sums over other items (same metrics, replicates and seed); nothing changes on error.
    pub fn merge(&mut self, o: &ExternalReplicates) -> Result<(), SumError> {
        self.same_shape(o)?;
        let counts = self.counts.iter().zip(&o.counts).map(|(a, b)| a.checked_add(*b).ok_or(SumError::Overflow { count: *a })).collect::<Result<Vec<_>, _>>()?;
        let sums = self.sums.iter().zip(&o.sums).map(|(a, b)| a.checked_add(*b).ok_or(SumError::Overflow { count: 0 })).collect::<Result<Vec<_>, _>>()?;
        self.counts = counts;
        self.sums = sums;
        Ok(())
    }

    /// Subtract sums over items that are part of these (a window); nothing changes on error.
    pub fn subtract(&mut self, o: &ExternalReplicates) -> Result<(), SumError> {
        self.same_shape(o)?;
        let counts = self.counts.iter().zip(&o.counts).map(|(a, b)| a.checked_sub(*b).ok_or(SumError::Overflow { count: *a })).collect::<Result<Vec<_>, _>>()?;
        let sums = self.sums.iter().zip(&o.sums).map(|(a, b)| a.checked_sub(*b).ok_or(SumError::Overflow { count: 0 })).collect::<Result<Vec<_>, _>>()?;
        self.counts = counts;
        self.sums = sums;
        Ok(())
    }

    /// Replicate `r` of metric `m`: (weighted count, weighted fixed-point sum).
    pub fn replicate(&self, m: usize, r: usize) -> Option<(u64, i128)> {
        (m < self.metrics && r < self.resamples).then(|| (self.counts[m * self.resamples + r], self.sums[m * self.resamples + r]))
    }

    /// The replicate means of metric `m` (unscaled), skipping replicates whose weights are all
    /// zero (possible for a handful of items: each weight is 0 with probability e^-1).
    pub fn means(&self, m: usize, decimals: u32) -> Vec<f64> {
        let scale = 10f64.powi(decimals as i32);
        (0..self.resamples).filter_map(|r| self.replicate(m, r)).filter(|&(c, _)| c > 0).map(|(c, s)| s as f64 / (c as f64 * scale)).collect()
    }

    /// The percentile interval of metric `m`'s mean at `level`; None without replicates or
    /// values.
    pub fn interval(&self, m: usize, decimals: u32, level: f64) -> Option<Interval> {
        let mut means = self.means(m, decimals);
        let resamples = means.len();
        let (low, high) = percentile_interval(&mut means, level)?;
        Some(Interval { level, low, high, resamples, method: METHOD, seed: self.seed })
    }

    /// The sums for a durable copy: counts then sums, both metric-major.
    pub fn parts(&self) -> (&[u64], &[i128]) {
        (&self.counts, &self.sums)
    }

    /// Rebuild from [`ExternalReplicates::parts`]; None when the lengths do not fit.
    pub fn from_parts(metrics: usize, resamples: usize, seed: u64, counts: Vec<u64>, sums: Vec<i128>) -> Option<ExternalReplicates> {
        let n = metrics.checked_mul(resamples)?;
        (counts.len() == n && sums.len() == n).then_some(ExternalReplicates { resamples, seed, metrics, counts, sums })
    }

    /// Bytes of the sums in memory.
    pub fn memory_bytes(&self) -> usize {
        self.counts.len() * 8 + self.sums.len() * 16
    }
}
