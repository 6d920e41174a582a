//! The `recent` window: the statistics of the last N scored segments, kept exactly as a ring of
//! per-segment records plus their running sum (add the new segment, subtract the one that
//! falls out). A record holds only the fields the configuration uses.

use std::collections::VecDeque;

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

/// Exact statistics of the last `capacity` segments.
#[derive(Debug)]
pub struct Window {
    capacity: usize,
    layout: Layout,
    /// Records of `layout.width()` values each, oldest first.
    rows: VecDeque<u64>,
    sum: CorpusStats,
    scratch: Vec<u64>,
    /// Id the next pushed segment gets (ids only grow, across resets too), so that a durable
    /// copy can key rows by it.
    next_id: u64,
}

/// What one push changed, for a durable copy of the window.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Pushed {
    /// Id of the new row.
    pub id: u64,
    /// The new row.
    pub row: Vec<u64>,
    /// Id of the row that fell out, if any.
    pub dropped: Option<u64>,
}

impl Window {
    /// An empty window of `capacity` segments (at least 1).
    pub fn new(capacity: usize, config: &ScoreConfig) -> Window {
        let layout = Layout::new(config);
        Window { capacity: capacity.max(1), layout, rows: VecDeque::new(), sum: CorpusStats::default(), scratch: Vec::new(), next_id: 0 }
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
            w.sum.add_segment(&w.layout.decode(&row));
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

    /// Add a segment, dropping the oldest when full.
    pub fn push(&mut self, s: &SegmentStats) -> Pushed {
        let w = self.layout.width();
        let len = self.sum.segments;
        let mut dropped = None;
        if len as usize == self.capacity {
            let old: Vec<u64> = self.rows.drain(..w).collect();
            self.sum.sub_segment(&self.layout.decode(&old));
            dropped = Some(self.next_id - len);
        }
        self.scratch.clear();
        self.layout.encode(s, &mut self.scratch);
        self.rows.extend(self.scratch.iter().copied());
        // Add what was kept, so that what is later subtracted is exactly what was added.
        self.sum.add_segment(&self.layout.decode(&self.scratch));
        let id = self.next_id;
        self.next_id += 1;
        Pushed { id, row: self.scratch.clone(), dropped }
    }

    /// Sum over the segments in the window.
    pub fn stats(&self) -> CorpusStats {
        self.sum
    }

    /// Forget everything.
    pub fn clear(&mut self) {
        self.rows.clear();
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
            let p = w.push(&random_stats(&mut rng));
            rows.insert(p.id, p.row);
            if let Some(d) = p.dropped {
                assert!(rows.remove(&d).is_some(), "dropped id {d} was a live row");
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
