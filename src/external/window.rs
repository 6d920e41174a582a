//! The `recent` window of external values: the last N items that carried external values,
//! with their exact sums and (when the session keeps replicates) replicate sums.
//!
//! # Which items
//! One window of items, in the order their batches were applied: an item enters when its
//! values are counted, whether it was scored against a segment or sent for its values alone
//! (`values_only`). N is the session's `window`. When every item carries a hypothesis and
//! values (the usual case), it holds the values of exactly the segments of the built-in
//! `recent` window; values-only items and items whose hypothesis matched no segment enter this
//! one only, and scored items without values the built-in one only.
//!
//! # Sums
//! The window keeps its items (key and fixed-point values: memory bounded by N) and their
//! sums, additive integers: a batch adds its items' sums and its replicate sums (computed when
//! the batch was scored, outside any lock), and each item that falls out is subtracted with its
//! own weights. So the window's sums always equal the sums of its items recomputed, exactly.
//!
//! # Durable copy
//! Each batch's items, as rows of u64 ([`encode_item`]) with consecutive ids; a store keeps the
//! rows of the items still in the window and rebuilds the sums from them at startup.

use std::collections::{HashMap, VecDeque};

use super::replicates::ExternalReplicates;
use super::{ExternalTotals, ItemValues, SumError};

/// The last `capacity` items that carried external values.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct ExternalWindow {
    capacity: usize,
    /// (weight key, values), oldest first.
    items: VecDeque<(u64, ItemValues)>,
    /// Id the next item gets (ids only grow, across resets too).
    next_id: u64,
    totals: ExternalTotals,
    replicates: Option<ExternalReplicates>,
}

impl ExternalWindow {
    /// An empty window of `capacity` items (at least 1) over `metrics` metrics, with
    /// replicate sums under `resampling` (resamples, seed) when given; the next item gets
    /// `next_id`.
    pub fn new(capacity: usize, metrics: usize, resampling: Option<(usize, u64)>, next_id: u64) -> ExternalWindow {
        ExternalWindow { capacity: capacity.max(1), items: VecDeque::new(), next_id, totals: ExternalTotals::new(metrics), replicates: resampling.map(|(r, seed)| ExternalReplicates::new(metrics, r, seed)) }
    }

    /// Rebuild a window from its items (oldest first; at most `capacity`, the last of them with
    /// id `next_id - 1`), recomputing the sums.
    pub fn restore(capacity: usize, metrics: usize, resampling: Option<(usize, u64)>, items: Vec<(u64, ItemValues)>, next_id: u64) -> Result<ExternalWindow, String> {
        let mut w = ExternalWindow::new(capacity, metrics, resampling, next_id.checked_sub(items.len() as u64).ok_or("more external window items than ids")?);
        if items.len() > w.capacity {
            return Err(format!("{} external window items; the window holds {}", items.len(), w.capacity));
        }
        let delta = super::ExternalDelta::of(metrics, resampling, &items).map_err(|e| e.to_string())?;
        w.add(&items, delta.replicates.as_ref()).map_err(|e| e.to_string())?;
        Ok(w)
    }

    /// Add a batch's items (in order) and their replicate sums `replicates` (required when the
    /// window keeps replicates), dropping the oldest items beyond the capacity. Nothing changes
    /// on error.
    pub fn add(&mut self, items: &[(u64, ItemValues)], replicates: Option<&ExternalReplicates>) -> Result<(), SumError> {
        let mut totals = self.totals.clone();
        let mut reps = self.replicates.clone();
        match (&mut reps, replicates) {
            (Some(mine), Some(theirs)) => mine.merge(theirs)?,
            (None, _) => {}
            (Some(_), None) => return Err(SumError::Mismatch),
        }
        for (_, item) in items {
            totals.add_item(item)?;
        }
        let evicted = (self.items.len() + items.len()).saturating_sub(self.capacity);
        let mut weights = Vec::new();
        for (key, item) in self.items.iter().chain(items).take(evicted) {
            totals.subtract_item(item)?;
            if let Some(r) = &mut reps {
                // `reps` is a scratch copy, dropped on error.
                r.subtract_in_place(*key, item, &mut weights)?;
            }
        }
        // The sums are right; now the items.
        let from_old = evicted.min(self.items.len());
        self.items.drain(..from_old);
        self.items.extend(items.iter().skip(evicted - from_old).cloned());
        self.next_id += items.len() as u64;
        self.totals = totals;
        self.replicates = reps;
        Ok(())
    }

    /// Sums per metric over the items in the window.
    pub fn totals(&self) -> &ExternalTotals {
        &self.totals
    }

    /// Replicate sums over the items in the window (None: the session keeps none).
    pub fn replicates(&self) -> Option<&ExternalReplicates> {
        self.replicates.as_ref()
    }

    /// Items in the window.
    pub fn len(&self) -> usize {
        self.items.len()
    }

    /// Whether it holds no item.
    pub fn is_empty(&self) -> bool {
        self.items.is_empty()
    }

    /// Window size in items.
    pub fn capacity(&self) -> usize {
        self.capacity
    }

    /// Id the next item gets.
    pub fn next_id(&self) -> u64 {
        self.next_id
    }

    /// Id of the oldest item in the window (`next_id()` when empty).
    pub fn first_id(&self) -> u64 {
        self.next_id - self.items.len() as u64
    }

    /// The items, oldest first: (weight key, values).
    pub fn items(&self) -> impl Iterator<Item = &(u64, ItemValues)> + '_ {
        self.items.iter()
    }

    /// The (key, value) of metric `m` of every item that carries it, oldest first.
    pub fn values_of(&self, m: usize) -> Vec<(u64, i64)> {
        self.items.iter().filter_map(|(key, item)| item.0.iter().find(|&&(i, _)| i == m).map(|&(_, v)| (*key, v))).collect()
    }

    /// Per key, its latest item's value of metric `m`, in the order the keys first appear
    /// (oldest first); items without a value of `m` are skipped.
    pub fn latest_by_key(&self, m: usize) -> Vec<(u64, i64)> {
        latest_by_key(self.values_of(m))
    }

    /// Forget every item (ids go on).
    pub fn clear(&mut self) {
        *self = ExternalWindow::new(self.capacity, self.totals.0.len(), self.replicates.as_ref().map(|r| (r.resamples(), r.seed())), self.next_id);
    }

    /// Heap bytes held (about).
    pub fn memory_bytes(&self) -> usize {
        self.items.capacity() * std::mem::size_of::<(u64, ItemValues)>() + self.items.iter().map(|(_, v)| v.0.capacity() * 16).sum::<usize>() + self.replicates.as_ref().map_or(0, ExternalReplicates::memory_bytes)
    }
}

/// Per key, its latest value, in the order the keys first appear, of (key, value) pairs oldest
/// first.
pub fn latest_by_key(values: Vec<(u64, i64)>) -> Vec<(u64, i64)> {
    let mut at: HashMap<u64, usize> = HashMap::new();
    let mut out: Vec<(u64, i64)> = Vec::with_capacity(values.len());
    for (key, v) in values {
        match at.get(&key) {
            Some(&i) => out[i].1 = v,
            None => {
                at.insert(key, out.len());
                out.push((key, v));
            }
        }
    }
    out
}

/// Append one item as a durable row: its key, the number of values, then per value its metric
/// index and its fixed-point value (zigzag-encoded).
pub fn encode_item(key: u64, item: &ItemValues, out: &mut Vec<u64>) {
    out.push(key);
    out.push(item.0.len() as u64);
    for &(m, v) in &item.0 {
        out.push(m as u64);
        // Zigzag: small magnitudes of either sign stay small numbers.
        out.push(((v << 1) ^ (v >> 63)) as u64);
    }
}

/// The items of rows written by [`encode_item`], one after the other; None when they do not
/// parse or name a metric at or beyond `metrics`.
pub fn decode_items(mut rows: &[u64], metrics: usize) -> Option<Vec<(u64, ItemValues)>> {
    let mut out = Vec::new();
    while let [key, n, rest @ ..] = rows {
        let n = usize::try_from(*n).ok().filter(|&n| n <= super::MAX_EXTERNAL_METRICS && 2 * n <= rest.len())?;
        let values: Vec<(usize, i64)> = rest[..2 * n].chunks_exact(2).map(|p| (p[0] as usize, (p[1] >> 1) as i64 ^ -((p[1] & 1) as i64))).collect();
        if values.iter().any(|&(m, _)| m >= metrics) || values.windows(2).any(|w| w[0].0 >= w[1].0) {
            return None;
        }
        out.push((*key, ItemValues(values)));
        rows = &rest[2 * n..];
    }
    rows.is_empty().then_some(out)
}
