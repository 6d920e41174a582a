//! The `recent` window: the statistics of the last N scored segments, kept exactly as a ring of
//! per-segment records plus their running sum (add the new segment, subtract the one that
//! falls out). A record holds only the fields the configuration uses.

use std::collections::VecDeque;

use crate::metric::{CorpusStats, OrderCounts, ScoreConfig, SegmentStats};

/// Fields kept per segment, in order.
#[derive(Debug, Clone, Copy)]
struct Layout {
    bleu: usize,
    chrf: usize,
    chrfpp: (usize, usize),
}

impl Layout {
    fn new(c: &ScoreConfig) -> Layout {
        Layout {
            bleu: if c.metrics.bleu { c.bleu_order } else { 0 },
            chrf: if c.metrics.chrf { c.chrf_char_order } else { 0 },
            chrfpp: if c.metrics.chrfpp { (c.chrf_char_order, c.chrf_word_order) } else { (0, 0) },
        }
    }

    fn width(&self) -> usize {
        let b = if self.bleu > 0 { 2 * self.bleu + 2 } else { 0 };
        b + 3 * self.chrf + 3 * (self.chrfpp.0 + self.chrfpp.1)
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
        counts(&s.chrf.char, self.chrf, out);
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
        counts(&mut s.chrf.char, self.chrf);
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
}

impl Window {
    /// An empty window of `capacity` segments (at least 1).
    pub fn new(capacity: usize, config: &ScoreConfig) -> Window {
        let layout = Layout::new(config);
        Window { capacity: capacity.max(1), layout, rows: VecDeque::new(), sum: CorpusStats::default(), scratch: Vec::new() }
    }

    /// Window size in segments.
    pub fn capacity(&self) -> usize {
        self.capacity
    }

    /// Add a segment, dropping the oldest when full.
    pub fn push(&mut self, s: &SegmentStats) {
        let w = self.layout.width();
        if self.sum.segments as usize == self.capacity {
            let old: Vec<u64> = self.rows.drain(..w).collect();
            self.sum.sub_segment(&self.layout.decode(&old));
        }
        self.scratch.clear();
        self.layout.encode(s, &mut self.scratch);
        self.rows.extend(self.scratch.iter().copied());
        // Add what was kept, so that what is later subtracted is exactly what was added.
        self.sum.add_segment(&self.layout.decode(&self.scratch));
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
    use crate::metric::MetricSet;
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
    fn window_equals_sum_of_last_n() {
        for metrics in ["bleu", "chrf", "chrf++", "bleu,chrf,chrf++"] {
            let config = ScoreConfig { metrics: metrics.parse::<MetricSet>().unwrap(), bleu_order: 3, chrf_word_order: 1, ..Default::default() };
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
