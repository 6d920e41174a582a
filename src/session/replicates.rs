//! A session's bootstrap replicates ([`crate::metric::resample`]): cumulative replicate sums,
//! and what the `recent` window's replicate sums are derived from at read time.
//!
//! # The window without subtracting
//! Let K(i) be the cumulative replicate sums over the records with ids below i. The window
//! holds the records `first..next`, so its sums are K(next) - K(first). K(next) is the
//! cumulative sum; K(first) is not kept, but checkpoints K(c) are, one every
//! [`checkpoint_spacing`] records (taken at batch ends): with c the oldest checkpoint at or
//! after `first`, K(first) = K(c) - (records first..c), and those records are in the window.
//! So a batch adds its replicate sums once (computed while it is scored, outside the session's
//! lock) and nothing is subtracted per record; a read adds at most a spacing's worth of
//! records (plus one batch). Exact, like every statistic here: all integers.

use std::collections::VecDeque;

use crate::metric::resample::{Replicates, Resampling};
use crate::metric::ScoreConfig;

use super::window::{Window, NO_SEGMENT};

/// Checkpoints kept over a window (about): the window's replicate sums cost at most
/// `window / RECENT_CHECKPOINTS` records (plus one batch) to derive at read time, and
/// `RECENT_CHECKPOINTS + 2` copies of the sums in memory.
pub const RECENT_CHECKPOINTS: u64 = 8;
/// Fewest records between two checkpoints.
pub const MIN_CHECKPOINT_SPACING: u64 = 32;
/// Records between durable copies of the cumulative replicate sums: a store keeps the window
/// records since the last copy too, and rebuilds the sums from both at startup.
pub const REPLICATE_SAVE_RECORDS: u64 = 100_000;

/// Records between checkpoints for a window of `window` segments.
pub fn checkpoint_spacing(window: usize) -> u64 {
    (window as u64).div_ceil(RECENT_CHECKPOINTS).max(MIN_CHECKPOINT_SPACING)
}

/// Cumulative replicate sums of a session and the checkpoints of its window.
#[derive(Debug)]
pub struct SessionReplicates {
    cumulative: Replicates,
    /// Whether `cumulative` covers every segment since creation or the last reset (false for a
    /// session restored from a store written before sessions kept replicates).
    complete: bool,
    /// (id, K(id)), ids increasing; at least one at or after the window's first record.
    checkpoints: VecDeque<(u64, Replicates)>,
    spacing: u64,
    /// Records from this id on carry their segment code.
    keyed_from: u64,
    /// Id up to which (exclusive) the last durable copy covers the cumulative sums.
    saved_to: u64,
    /// Records between durable copies ([`REPLICATE_SAVE_RECORDS`]).
    save_every: u64,
}

/// A durable copy of cumulative replicate sums.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct SavedReplicates {
    /// They cover the records with ids below this.
    pub covered_to: u64,
    /// See [`SessionReplicates`]: every segment since creation or reset.
    pub complete: bool,
    /// [`Replicates::sums`].
    pub sums: Vec<u64>,
}

/// What a read needs to derive a session's intervals, copied under its lock.
#[derive(Debug, Clone)]
pub struct ReplicateCopy {
    /// Cumulative sums (None when incomplete).
    pub cumulative: Option<Replicates>,
    /// K(c) and the records first..c (fields and segment code), or None when the window holds
    /// records without a segment code.
    pub recent: Option<(Replicates, Replicates, Vec<Vec<u64>>)>,
}

impl SessionReplicates {
    /// Empty sums for a new session whose window's next record id is `next_id`.
    pub fn new(config: &ScoreConfig, r: Resampling, window: usize, next_id: u64) -> SessionReplicates {
        let cumulative = Replicates::new(config, r.resamples, r.seed);
        let checkpoints = VecDeque::from([(next_id, cumulative.clone())]);
        SessionReplicates { cumulative, complete: true, checkpoints, spacing: checkpoint_spacing(window), keyed_from: next_id, saved_to: next_id, save_every: REPLICATE_SAVE_RECORDS }
    }

    /// Rebuild from a durable copy (None: the store predates replicates) and the records since
    /// it (ids `records_from..window.next_id()`, oldest first, fields then code), given the
    /// rebuilt window. `key` maps a segment code to its replicate key.
    pub fn restore(
        config: &ScoreConfig,
        r: Resampling,
        window: &Window,
        saved: Option<SavedReplicates>,
        records_from: u64,
        records: &[Vec<u64>],
        key: impl Fn(u64) -> Option<u64>,
    ) -> Result<SessionReplicates, String> {
        let next = window.next_id();
        let mut s = SessionReplicates::new(config, r, window.capacity(), next);
        let fields = s.cumulative.fields() - 1;
        let add = |into: &mut Replicates, rec: &[u64]| -> Result<(), String> {
            let k = rec.get(fields).and_then(|&c| if c == NO_SEGMENT { None } else { key(c) }).ok_or("a window record names no segment")?;
            into.add_row(k, &rec[..fields]);
            Ok(())
        };
        match saved {
            Some(saved) => {
                if !saved.sums.is_empty() {
                    s.cumulative = Replicates::from_sums(config, r.resamples, r.seed, saved.sums).ok_or("replicate sums of another shape")?;
                }
                s.complete = saved.complete;
                let skip = saved.covered_to.checked_sub(records_from).ok_or("records missing before the replicate copy")?;
                for rec in records.iter().skip(skip as usize) {
                    add(&mut s.cumulative, rec)?;
                }
                s.saved_to = saved.covered_to;
            }
            None => s.complete = false,
        }
        // The window's records from the newest one back to the first without a code.
        let keyed = (window.first_id()..next).rev().take_while(|&id| window.record(id).is_some_and(|r| r[fields] != NO_SEGMENT)).count() as u64;
        s.keyed_from = next - keyed;
        let mut k = s.cumulative.clone();
        for rec in window.records(s.keyed_from, next) {
            let mut one = Replicates::new(config, r.resamples, r.seed);
            add(&mut one, rec)?;
            k.subtract(&one).map_err(|e| e.to_string())?;
        }
        s.checkpoints = VecDeque::from([(s.keyed_from, k)]);
        Ok(s)
    }

    /// Add a batch's replicate sums; `window` already holds its records. Returns the durable
    /// copy to write when one is due.
    pub fn add_batch(&mut self, delta: &Replicates, window: &Window) -> Option<SavedReplicates> {
        // Same kind by construction (the session made both).
        let _ = self.cumulative.merge(delta);
        let (first, next) = (window.first_id(), window.next_id());
        if self.checkpoints.back().is_none_or(|(id, _)| next - id >= self.spacing) {
            self.checkpoints.push_back((next, self.cumulative.clone()));
        }
        while self.checkpoints.front().is_some_and(|(id, _)| *id < first) {
            self.checkpoints.pop_front();
        }
        if self.checkpoints.is_empty() {
            self.checkpoints.push_back((next, self.cumulative.clone()));
        }
        (next - self.saved_to >= self.save_every).then(|| {
            self.saved_to = next;
            self.saved()
        })
    }

    /// The cumulative sums, when complete.
    pub fn cumulative(&self) -> Option<Replicates> {
        self.complete.then(|| self.cumulative.clone())
    }

    /// The cumulative sums as a durable copy.
    pub fn saved(&self) -> SavedReplicates {
        SavedReplicates { covered_to: self.saved_to, complete: self.complete, sums: self.cumulative.sums().to_vec() }
    }

    /// Id from which the store must keep window records (those after the last durable copy).
    pub fn saved_to(&self) -> u64 {
        self.saved_to
    }

    /// Zero everything (the window was cleared and goes on at `next_id`).
    pub fn reset(&mut self, next_id: u64) {
        let c = &self.cumulative;
        let save_every = self.save_every;
        *self = SessionReplicates::new(c.config(), Resampling { resamples: c.resamples(), seed: c.seed() }, 0, next_id).with_spacing(self.spacing);
        self.save_every = save_every;
    }

    fn with_spacing(mut self, spacing: u64) -> Self {
        self.spacing = spacing;
        self
    }

    /// Write durable copies every `n` records instead of [`REPLICATE_SAVE_RECORDS`] (tests).
    #[doc(hidden)]
    pub fn set_save_every(&mut self, n: u64) {
        self.save_every = n;
    }

    /// What a read needs, copied (short: at most a spacing and a batch of records).
    pub fn copy(&self, window: &Window) -> ReplicateCopy {
        let first = window.first_id();
        let recent = (first >= self.keyed_from).then(|| self.checkpoints.iter().find(|(id, _)| *id >= first)).flatten().map(|(c, k)| {
            let records = window.records(first, *c).map(<[u64]>::to_vec).collect();
            (self.cumulative.clone(), k.clone(), records)
        });
        ReplicateCopy { cumulative: self.complete.then(|| self.cumulative.clone()), recent }
    }

    /// Heap bytes held.
    pub fn memory_bytes(&self) -> usize {
        self.cumulative.memory_bytes() * (1 + self.checkpoints.len())
    }
}

impl ReplicateCopy {
    /// The window's replicate sums: K(next) - K(c) + records first..c. `key` maps a segment
    /// code to its replicate key.
    pub fn recent(&self, key: impl Fn(u64) -> Option<u64>) -> Option<Replicates> {
        let (now, at_c, records) = self.recent.as_ref()?;
        let mut r = now.clone();
        r.subtract(at_c).ok()?;
        let fields = r.fields() - 1;
        for rec in records {
            r.add_row(key(*rec.get(fields)?)?, &rec[..fields]);
        }
        Some(r)
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::metric::layout::Layout;
    use crate::metric::SegmentStats;
    use crate::rng::SplitMix64;
    use crate::session::window::segment_code;

    fn stats(rng: &mut SplitMix64, layout: &Layout) -> SegmentStats {
        let mut s = SegmentStats::default();
        for n in 0..4 {
            s.bleu.totals[n] = 5 + rng.below(30);
            s.bleu.matches[n] = rng.below(s.bleu.totals[n] + 1);
        }
        (s.bleu.hyp_len, s.bleu.ref_len) = (rng.below(40), rng.below(40));
        for n in 0..6 {
            s.chrf.char.matches[n] = rng.below(50);
            s.chrf.char.hyp[n] = rng.below(60);
            s.chrf.char.reference[n] = rng.below(60);
        }
        // Only what the layout keeps.
        let mut v = Vec::new();
        layout.encode(&s, &mut v);
        layout.decode(&v)
    }

    /// Random batches into a window, resets in between: the window's replicate sums derived
    /// from checkpoints equal the sums of its last segments added one by one, and the
    /// cumulative sums those of every segment since the reset; a rebuild from the window
    /// records equals the original.
    #[test]
    fn window_sums_from_checkpoints_equal_direct_sums() {
        let config = ScoreConfig::default();
        let layout = Layout::new(&config);
        let key = |code: u64| Some(crate::metric::resample::segment_key((code >> 1).to_string().as_bytes()));
        for (window_size, resamples) in [(1usize, 8usize), (5, 4), (37, 12), (100, 8)] {
            let r = Resampling { resamples, seed: 3 };
            let mut rng = SplitMix64::new(window_size as u64);
            let mut w = Window::new(window_size, &config);
            let mut reps = SessionReplicates::new(&config, r, window_size, 0);
            let mut since_reset: Vec<(u64, SegmentStats)> = Vec::new();
            for round in 0..80 {
                if round % 30 == 29 {
                    w.clear();
                    reps.reset(w.next_id());
                    since_reset.clear();
                }
                let mut delta = Replicates::new(&config, resamples, r.seed);
                for _ in 0..rng.below(2 * window_size as u64 + 3) {
                    let index = rng.below(1000) as u32;
                    let s = stats(&mut rng, &layout);
                    let code = segment_code(false, index);
                    delta.add(key(code).unwrap(), &s);
                    w.push(&s, code);
                    since_reset.push((code, s));
                }
                reps.add_batch(&delta, &w);
                let mut want_all = Replicates::new(&config, resamples, r.seed);
                since_reset.iter().for_each(|(c, s)| want_all.add(key(*c).unwrap(), s));
                let mut want_recent = Replicates::new(&config, resamples, r.seed);
                since_reset.iter().rev().take(window_size).for_each(|(c, s)| want_recent.add(key(*c).unwrap(), s));
                let copy = reps.copy(&w);
                assert_eq!(copy.cumulative.as_ref(), Some(&want_all), "window {window_size}, round {round}");
                assert_eq!(copy.recent(key).as_ref(), Some(&want_recent), "window {window_size}, round {round}");
                assert!(reps.checkpoints.len() as u64 <= RECENT_CHECKPOINTS + 2 + window_size as u64 / MIN_CHECKPOINT_SPACING, "{}", reps.checkpoints.len());
            }
            // Rebuilt from a copy covering everything and the window's records alone.
            let saved = SavedReplicates { covered_to: w.next_id(), complete: true, sums: reps.cumulative.sums().to_vec() };
            let back = SessionReplicates::restore(&config, r, &w, Some(saved), w.next_id(), &[], key).unwrap();
            assert_eq!(back.copy(&w).recent(key), reps.copy(&w).recent(key));
            // Without a copy (a store from before replicates): no cumulative interval; the
            // window's is back once its records carry segment codes.
            let back = SessionReplicates::restore(&config, r, &w, None, w.next_id(), &[], key).unwrap();
            let copy = back.copy(&w);
            assert!(copy.cumulative.is_none());
            assert_eq!(copy.recent(key), reps.copy(&w).recent(key));
        }
    }
}
