//! The `recent` window: the statistics of the last N scored segments, kept exactly as a ring of
//! per-segment records plus their running sum (add the new segment, subtract the one that
//! falls out). A record holds only the fields the configuration uses, then the code of the
//! segment it scored ([`segment_code`]), so that bootstrap replicates and comparisons can key
//! it by segment.

use crate::metric::layout::Layout;
use crate::metric::{CorpusStats, ScoreConfig, SegmentStats};

/// The code a window record keeps of its segment: `index << 1 | by_source` (see
/// [`super::Outcome::Scored`]).
pub fn segment_code(by_source: bool, index: u32) -> u64 {
    u64::from(index) << 1 | u64::from(by_source)
}

/// The code of a record restored from a store written before records kept their segment.
pub const NO_SEGMENT: u64 = u64::MAX;

/// Exact statistics of the last `capacity` segments.
#[derive(Debug)]
pub struct Window {
    capacity: usize,
    layout: Layout,
    /// A ring of records of `layout.width() + 1` values each (the fields, then the segment
    /// code): filled in order up to `capacity`, then each new record overwrites the oldest, at
    /// `head`.
    rows: Vec<u64>,
    /// Index (in records) of the oldest record once the ring is full.
    head: usize,
    sum: CorpusStats,
    scratch: Vec<u64>,
    /// Id the next pushed segment gets (ids only grow, across resets too), so that a durable
    /// copy can key rows by it.
    next_id: u64,
}

impl Window {
    /// An empty window of `capacity` segments (at least 1).
    pub fn new(capacity: usize, config: &ScoreConfig) -> Window {
        let layout = Layout::new(config);
        Window { capacity: capacity.max(1), layout, rows: Vec::new(), head: 0, sum: CorpusStats::default(), scratch: Vec::new(), next_id: 0 }
    }

    /// Rebuild a window from durable rows (oldest first, at most `capacity` of them) and the id
    /// the next row gets. A row is the fields and its segment code, or (written before records
    /// kept their segment) the fields alone, which get [`NO_SEGMENT`].
    pub fn restore(capacity: usize, config: &ScoreConfig, rows: impl IntoIterator<Item = Vec<u64>>, next_id: u64) -> Result<Window, String> {
        let mut w = Window::new(capacity, config);
        let width = w.layout.width();
        for mut row in rows {
            match row.len() {
                n if n == width => row.push(NO_SEGMENT),
                n if n == width + 1 => {}
                n => return Err(format!("window row of {n} values, expected {} (or {width})", width + 1)),
            }
            if w.sum.segments as usize == w.capacity {
                return Err("more window rows than the window holds".into());
            }
            w.layout.fold(&row[..width], &mut w.sum, true);
            w.rows.extend(row);
        }
        w.next_id = next_id;
        Ok(w)
    }

    /// Id of the oldest record in the window (`next_id()` when empty).
    pub fn first_id(&self) -> u64 {
        self.next_id - self.len() as u64
    }

    /// The record with id `id` (fields, then segment code), while it is in the window.
    pub fn record(&self, id: u64) -> Option<&[u64]> {
        let k = id.checked_sub(self.first_id()).filter(|&k| k < self.len() as u64)? as usize;
        let w = self.layout.width() + 1;
        let at = (self.head + k) % self.capacity * w;
        Some(&self.rows[at..at + w])
    }

    /// The records with ids in `from..to` that are in the window, oldest first.
    pub fn records(&self, from: u64, to: u64) -> impl Iterator<Item = &[u64]> + '_ {
        (from.max(self.first_id())..to.min(self.next_id)).filter_map(|id| self.record(id))
    }

    /// Id the next pushed row gets.
    pub fn next_id(&self) -> u64 {
        self.next_id
    }

    /// Window size in segments.
    pub fn capacity(&self) -> usize {
        self.capacity
    }

    /// Add a segment (with its [`segment_code`]), dropping the oldest when full; the new
    /// record (as kept: what a durable copy stores), whose id is `next_id() - 1` afterwards.
    pub fn push(&mut self, s: &SegmentStats, code: u64) -> &[u64] {
        let fields = self.layout.width();
        let w = fields + 1;
        self.scratch.clear();
        self.layout.encode(s, &mut self.scratch);
        self.scratch.push(code);
        if self.len() == self.capacity {
            let at = self.head * w;
            self.layout.fold(&self.rows[at..at + fields], &mut self.sum, false);
            self.rows[at..at + w].copy_from_slice(&self.scratch);
            self.head = (self.head + 1) % self.capacity;
        } else {
            self.rows.extend_from_slice(&self.scratch);
        }
        // Add what was kept, so that what is later subtracted is exactly what was added.
        self.layout.fold(&self.scratch[..fields], &mut self.sum, true);
        self.next_id += 1;
        &self.scratch
    }

    /// Segments in the window.
    pub fn len(&self) -> usize {
        self.sum.segments as usize
    }

    /// Whether the window holds no segment.
    pub fn is_empty(&self) -> bool {
        self.len() == 0
    }

    /// Sum over the segments in the window.
    pub fn stats(&self) -> CorpusStats {
        self.sum
    }

    /// Forget everything.
    pub fn clear(&mut self) {
        self.rows.clear();
        self.head = 0;
        self.sum = CorpusStats::default();
    }

    /// Heap bytes held.
    pub fn memory_bytes(&self) -> usize {
        self.rows.capacity() * 8
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::rng::SplitMix64;

    fn random_stats(rng: &mut SplitMix64) -> SegmentStats {
        let mut s = SegmentStats::default();
        for n in 0..8 {
            s.bleu.matches[n] = rng.below(20);
            s.bleu.totals[n] = rng.below(30);
        }
        s.bleu.hyp_len = rng.below(40);
        s.bleu.ref_len = rng.below(40);
        for n in 0..10 {
            s.chrf.char.matches[n] = rng.below(50);
            s.chrfpp.char.hyp[n] = rng.below(50);
            s.chrfpp.word.reference[n] = rng.below(50);
        }
        s
    }

    #[test]
    fn restore_rebuilds_the_same_window() {
        let config = ScoreConfig::default();
        let mut rng = SplitMix64::new(5);
        let mut w = Window::new(4, &config);
        let mut rows = std::collections::BTreeMap::new();
        for _ in 0..11 {
            let row = w.push(&random_stats(&mut rng), 9).to_vec();
            rows.insert(w.next_id() - 1, row);
            while rows.len() > w.len() {
                rows.pop_first();
            }
        }
        assert_eq!(rows.len(), 4);
        assert_eq!(*rows.keys().next().unwrap(), 7);
        let back = Window::restore(4, &config, rows.clone().into_values(), w.next_id()).unwrap();
        assert_eq!(back.stats(), w.stats());
        assert_eq!(back.records(0, 100).collect::<Vec<_>>(), w.records(0, 100).collect::<Vec<_>>());
        assert_eq!(w.first_id(), 7);
        assert_eq!(w.record(8).unwrap().last(), Some(&9));
        assert!(w.record(6).is_none() && w.record(11).is_none());
        // Rows written before records kept their segment: the fields alone.
        let old = rows.into_values().map(|mut r| {
            r.pop();
            r
        });
        let back = Window::restore(4, &config, old, w.next_id()).unwrap();
        assert_eq!(back.stats(), w.stats());
        assert!(back.records(0, 100).all(|r| r.last() == Some(&NO_SEGMENT)));
        assert!(Window::restore(4, &config, vec![vec![1, 2]], 0).is_err());
    }

    #[test]
    fn window_equals_sum_of_last_n() {
        for metrics in ["bleu:order=3", "chrf", "chrf:words=1", "chrf++:words=1", "bleu:order=3 chrf:chars=4 chrf++:words=1"] {
            let config: ScoreConfig = metrics.parse().unwrap();
            let layout = Layout::new(&config);
            let mut rng = SplitMix64::new(11);
            let mut w = Window::new(7, &config);
            let mut all = Vec::new();
            for _ in 0..40 {
                let s = layout.decode(&{
                    let mut v = Vec::new();
                    layout.encode(&random_stats(&mut rng), &mut v);
                    v
                });
                w.push(&s, 0);
                all.push(s);
                let mut want = CorpusStats::default();
                all.iter().rev().take(7).for_each(|s| want.add_segment(s));
                assert_eq!(w.stats(), want, "{metrics}");
            }
            w.clear();
            assert_eq!(w.stats(), CorpusStats::default());
        }
    }
}
