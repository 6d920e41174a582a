//! The fields of [`SegmentStats`] a configuration uses, as a flat row of integers: what the
//! `recent` window keeps per segment and what each bootstrap replicate sums
//! ([`super::resample`]). Rows add and subtract field by field, exactly.

use super::{CorpusStats, OrderCounts, ScoreConfig, SegmentStats};

/// Fields kept per segment, in order.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub(crate) struct Layout {
    bleu: usize,
    /// (character orders, word orders) of chrF and of chrF++; (0, 0) when not configured.
    chrf: (usize, usize),
    chrfpp: (usize, usize),
}

impl Layout {
    pub(crate) fn new(c: &ScoreConfig) -> Layout {
        Layout {
            bleu: c.bleu_order(),
            chrf: c.metrics.chrf.map_or((0, 0), |p| (p.chars, p.words)),
            chrfpp: c.metrics.chrfpp.map_or((0, 0), |p| (p.chars, p.words)),
        }
    }

    pub(crate) fn width(&self) -> usize {
        let b = if self.bleu > 0 { 2 * self.bleu + 2 } else { 0 };
        b + 3 * (self.chrf.0 + self.chrf.1) + 3 * (self.chrfpp.0 + self.chrfpp.1)
    }

    pub(crate) fn encode(&self, s: &SegmentStats, out: &mut Vec<u64>) {
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

    pub(crate) fn decode(&self, mut r: &[u64]) -> SegmentStats {
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
    pub(crate) fn fold(&self, mut r: &[u64], sum: &mut CorpusStats, add: bool) {
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
