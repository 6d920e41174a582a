//! chrF (Popović 2015) and chrF++ (Popović 2017).
//!
//! Character n-grams of orders 1..=C over the text with all white space removed (chrF++ adds word
//! n-grams of orders 1..=W over the white-space separated words). Per order: `matches` = sum over
//! n-grams of min(hypothesis count, reference count), `hyp` = hypothesis n-grams, `reference` =
//! reference n-grams. chrP and chrR are the arithmetic means over the orders of
//! matches/hyp and matches/reference, and chrF_beta = (1 + b^2) P R / (b^2 P + R).
//!
//! An order where the hypothesis (the reference) has no n-gram has no precision (no recall): the
//! means are taken over the orders where they are defined, so a one-character hypothesis equal to
//! its reference scores 100, and an empty hypothesis scores 0. With several references, the one
//! with the best sentence-level chrF is used for the segment (the first on a tie). Corpus scores
//! come from the summed per-order statistics.

use serde::{Deserialize, Serialize};

use super::{add_arrays, sub_arrays, MAX_CHRF_CHAR_ORDER};

/// Per-order counts; arrays are indexed by order - 1 and hold zeros past the configured order.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq, Serialize, Deserialize)]
pub struct OrderCounts {
    /// Matched n-grams per order.
    pub matches: [u64; MAX_CHRF_CHAR_ORDER],
    /// Hypothesis n-grams per order.
    pub hyp: [u64; MAX_CHRF_CHAR_ORDER],
    /// Reference n-grams per order.
    #[serde(rename = "ref")]
    pub reference: [u64; MAX_CHRF_CHAR_ORDER],
}

impl OrderCounts {
    fn add(&mut self, o: &Self) {
        add_arrays(&mut self.matches, &o.matches);
        add_arrays(&mut self.hyp, &o.hyp);
        add_arrays(&mut self.reference, &o.reference);
    }
    fn sub(&mut self, o: &Self) {
        sub_arrays(&mut self.matches, &o.matches);
        sub_arrays(&mut self.hyp, &o.hyp);
        sub_arrays(&mut self.reference, &o.reference);
    }
    /// These counts with every order past `order` zeroed.
    pub fn up_to(&self, order: usize) -> OrderCounts {
        let mut c = *self;
        for a in [&mut c.matches, &mut c.hyp, &mut c.reference] {
            a[order.min(MAX_CHRF_CHAR_ORDER)..].fill(0);
        }
        c
    }
    /// (matches, hyp, reference) of the first `order` orders.
    fn orders(&self, order: usize) -> impl Iterator<Item = (u64, u64, u64)> + '_ {
        (0..order.min(MAX_CHRF_CHAR_ORDER)).map(|i| (self.matches[i], self.hyp[i], self.reference[i]))
    }
}

/// chrF sufficient statistics: character orders, and word orders for chrF++.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq, Serialize, Deserialize)]
pub struct ChrfStats {
    /// Character n-gram counts.
    pub char: OrderCounts,
    /// Word n-gram counts (chrF++ only; zero for chrF).
    pub word: OrderCounts,
}

impl ChrfStats {
    /// These statistics restricted to character orders 1..=`chars` and word orders
    /// 1..=`words` (the rest zeroed): what one chrF-family metric keeps when several are
    /// computed from the same counts.
    pub fn up_to(&self, chars: usize, words: usize) -> ChrfStats {
        ChrfStats { char: self.char.up_to(chars), word: self.word.up_to(words) }
    }
}

impl std::ops::AddAssign for ChrfStats {
    fn add_assign(&mut self, o: Self) {
        self.char.add(&o.char);
        self.word.add(&o.word);
    }
}

impl std::ops::SubAssign for ChrfStats {
    fn sub_assign(&mut self, o: Self) {
        self.char.sub(&o.char);
        self.word.sub(&o.word);
    }
}

/// A chrF score derived from statistics.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct ChrfScore {
    /// chrF (or chrF++) on a 0-100 scale.
    pub score: f64,
    /// Mean n-gram precision, 0-100.
    pub precision: f64,
    /// Mean n-gram recall, 0-100.
    pub recall: f64,
}

/// F-beta of a precision and a recall (any common scale); 0 when both are 0.
pub fn f_beta(p: f64, r: f64, beta: f64) -> f64 {
    let b2 = beta * beta;
    let denom = b2 * p + r;
    if denom <= 0.0 {
        0.0
    } else {
        (1.0 + b2) * p * r / denom
    }
}

impl ChrfStats {
    /// The score over character orders 1..=`char_order` and word orders 1..=`word_order`.
    pub fn score(&self, char_order: usize, word_order: usize, beta: f64) -> ChrfScore {
        let (mut p_sum, mut p_n, mut r_sum, mut r_n) = (0.0, 0u32, 0.0, 0u32);
        for (m, h, r) in self.char.orders(char_order).chain(self.word.orders(word_order)) {
            if h > 0 {
                p_sum += m as f64 / h as f64;
                p_n += 1;
            }
            if r > 0 {
                r_sum += m as f64 / r as f64;
                r_n += 1;
            }
        }
        let p = if p_n == 0 { 0.0 } else { p_sum / p_n as f64 };
        let r = if r_n == 0 { 0.0 } else { r_sum / r_n as f64 };
        ChrfScore { score: 100.0 * f_beta(p, r, beta), precision: 100.0 * p, recall: 100.0 * r }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn counts(m: &[u64], h: &[u64], r: &[u64]) -> OrderCounts {
        let mut c = OrderCounts::default();
        c.matches[..m.len()].copy_from_slice(m);
        c.hyp[..h.len()].copy_from_slice(h);
        c.reference[..r.len()].copy_from_slice(r);
        c
    }

    #[test]
    fn f_beta_by_hand() {
        // P = 0.5, R = 0.25, beta 2: 5 * 0.125 / (2 + 0.25) = 0.2777...
        assert!((f_beta(0.5, 0.25, 2.0) - 0.625 / 2.25).abs() < 1e-12);
        assert_eq!(f_beta(0.0, 0.0, 2.0), 0.0);
    }

    #[test]
    fn means_over_defined_orders() {
        let s = ChrfStats { char: counts(&[1, 0, 0], &[1, 0, 0], &[3, 2, 1]), word: OrderCounts::default() };
        let sc = s.score(3, 0, 2.0);
        // P = 1 (only order 1 defined); R = (1/3 + 0 + 0) / 3 = 1/9.
        assert!((sc.precision - 100.0).abs() < 1e-12);
        assert!((sc.recall - 100.0 / 9.0).abs() < 1e-12);
        assert!((sc.score - 100.0 * f_beta(1.0, 1.0 / 9.0, 2.0)).abs() < 1e-12);
    }

    #[test]
    fn word_orders_join_the_average() {
        let s = ChrfStats { char: counts(&[4], &[4], &[4]), word: counts(&[0, 0], &[2, 1], &[2, 1]) };
        // chrF++ with 1 char order and 2 word orders: P = R = (1 + 0 + 0) / 3.
        let sc = s.score(1, 2, 2.0);
        assert!((sc.score - 100.0 / 3.0).abs() < 1e-12);
        assert!((s.score(1, 0, 2.0).score - 100.0).abs() < 1e-12);
    }

    #[test]
    fn additive() {
        let a = ChrfStats { char: counts(&[1, 2], &[3, 4], &[5, 6]), word: counts(&[1], &[1], &[1]) };
        let mut b = a;
        b += a;
        assert_eq!(b.char.matches[..2], [2, 4]);
        b -= a;
        assert_eq!(b, a);
    }
}
