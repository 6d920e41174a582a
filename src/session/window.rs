//! The `recent` window: the statistics of the last N scored segments, kept exactly as a ring of
//! per-segment records plus their running sum (add the new segment, subtract the one that
//! falls out). A record holds only the fields the configuration uses.

use crate::metric::{CorpusStats, OrderCounts, ScoreConfig, SegmentStats};

/// Fields kept per segment, in order.
#[derive(Debug, Clone, Copy)]
struct Layout {
    bleu: usize,
    /// (character orders, word orders) of chrF and of chrF++; (0, 0) when not configured.
    chrf: (usize, usize),
    chrfpp: (usize, usize),
}

impl Layout {
    fn new(c: &ScoreConfig) -> Layout {
        Layout {
            bleu: c.bleu_order(),
            chrf: c.metrics.chrf.map_or((0, 0), |p| (p.chars, p.words)),
            chrfpp: c.metrics.chrfpp.map_or((0, 0), |p| (p.chars, p.words)),
        }
    }

    fn width(&self) -> usize {
        let b = if self.bleu > 0 { 2 * self.bleu + 2 } else { 0 };
        b + 3 * (self.chrf.0 + self.chrf.1) + 3 * (self.chrfpp.0 + self.chrfpp.1)
    }

    fn encode(&self, s: &SegmentStats, out: &mut Vec<u64>) {
        if self.bleu > 0 {
            out.extend_from_slice(&s.bleu.matches[..self.bleu]);
            out.extend_from_slice(&s.bleu.totals[..self.bleu]);
            out.push(s.bleu.hyp_len);
            out.push(s.bleu.ref_len);
        }
        let counts = |c: &OrderCounts, n: usize, out: &mut Vec<u64>| {
            out.extend_from_slice(&c.matches[..n]);
            out.extend_from_slice(&c.hyp[..n]);
            out.extend_from_slice(&c.reference[..n]);
        };
        counts(&s.chrf.char, self.chrf.0, out);
        counts(&s.chrf.word, self.chrf.1, out);
        counts(&s.chrfpp.char, self.chrfpp.0, out);
        counts(&s.chrfpp.word, self.chrfpp.1, out);
    }

    #[cfg(test)]
    fn decode(&self, mut r: &[u64]) -> SegmentStats {
        let mut s = SegmentStats::default();
        let mut take = |dst: &mut [u64]| {
            let (a, b) = r.split_at(dst.len());
            dst.copy_from_slice(a);
            r = b;
        };
        if self.bleu > 0 {
            take(&mut s.bleu.matches[..self.bleu]);
            take(&mut s.bleu.totals[..self.bleu]);
            let mut l = [0u64; 2];
            take(&mut l);
            (s.bleu.hyp_len, s.bleu.ref_len) = (l[0], l[1]);
        }
        let mut counts = |c: &mut OrderCounts, n: usize| {
            take(&mut c.matches[..n]);
            take(&mut c.hyp[..n]);
            take(&mut c.reference[..n]);
        };
        counts(&mut s.chrf.char, self.chrf.0);
        counts(&mut s.chrf.word, self.chrf.1);
        counts(&mut s.chrfpp.char, self.chrfpp.0);
        counts(&mut s.chrfpp.word, self.chrfpp.1);
        s
    }
}

impl Layout {
    /// Add a record to `sum` (`add`), or take it away, without building its [`SegmentStats`]:
    /// the same fields, in the order of [`Layout::encode`].
    fn fold(&self, mut r: &[u64], sum: &mut CorpusStats, add: bool) {
        let mut step = |dst: &mut [u64]| {
            let (a, b) = r.split_at(dst.len());
            for (d, v) in dst.iter_mut().zip(a) {
                if add {
                    *d += v;
                } else {
                    *d -= v;
                }
            }
            r = b;
        };
        if self.bleu > 0 {
            step(&mut sum.bleu.matches[..self.bleu]);
            step(&mut sum.bleu.totals[..self.bleu]);
            step(std::slice::from_mut(&mut sum.bleu.hyp_len));
            step(std::slice::from_mut(&mut sum.bleu.ref_len));
        }
        let mut counts = |c: &mut OrderCounts, n: usize| {
            step(&mut c.matches[..n]);
            step(&mut c.hyp[..n]);
            step(&mut c.reference[..n]);
        };
        counts(&mut sum.chrf.char, self.chrf.0);
        counts(&mut sum.chrf.word, self.chrf.1);
        counts(&mut sum.chrfpp.char, self.chrfpp.0);
        counts(&mut sum.chrfpp.word, self.chrfpp.1);
        if add {
            sum.segments += 1;
        } else {
            sum.segments -= 1;
        }
    }
}

/// Exact statistics of the last `capacity` segments.
#[derive(Debug)]
pub struct Window {
    capacity: usize,
    layout: Layout,
    /// A ring of records of `layout.width()` values each: filled in order up to `capacity`,
    /// then each new record overwrites the oldest, at `head`.
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
    /// the next row gets.
    pub fn restore(capacity: usize, config: &ScoreConfig, rows: impl IntoIterator<Item = Vec<u64>>, next_id: u64) -> Result<Window, String> {
        let mut w = Window::new(capacity, config);
        let width = w.layout.width();
        for row in rows {
            if row.len() != width {
                return Err(format!("window row of {} values, expected {width}", row.len()));
            }
            if w.sum.segments as usize == w.capacity {
                return Err("more window rows than the window holds".into());
            }
            w.layout.fold(&row, &mut w.sum, true);
            w.rows.extend(row);
        }
        w.next_id = next_id;
        Ok(w)
    }

    /// Id the next pushed row gets.
    pub fn next_id(&self) -> u64 {
        self.next_id
    }

    /// Window size in segments.
    pub fn capacity(&self) -> usize {
        self.capacity
    }

    /// Add a segment, dropping the oldest when full; the new record (as kept: what a durable
    /// copy stores), whose id is `next_id() - 1` afterwards.
    pub fn push(&mut self, s: &SegmentStats) -> &[u64] {
        let w = self.layout.width();
        self.scratch.clear();
        self.layout.encode(s, &mut self.scratch);
        if self.len() == self.capacity {
            let at = self.head * w;
            self.layout.fold(&self.rows[at..at + w], &mut self.sum, false);
            self.rows[at..at + w].copy_from_slice(&self.scratch);
            self.head = (self.head + 1) % self.capacity;
        } else {
            self.rows.extend_from_slice(&self.scratch);
        }
        // Add what was kept, so that what is later subtracted is exactly what was added.
        self.layout.fold(&self.scratch, &mut self.sum, true);
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
            let row = w.push(&random_stats(&mut rng)).to_vec();
            rows.insert(w.next_id() - 1, row);
            while rows.len() > w.len() {
                rows.pop_first();
            }
        }
        assert_eq!(rows.len(), 4);
        assert_eq!(*rows.keys().next().unwrap(), 7);
        let back = Window::restore(4, &config, rows.into_values(), w.next_id()).unwrap();
        assert_eq!(back.stats(), w.stats());
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
                w.push(&s);
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
