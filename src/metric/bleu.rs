//! BLEU (Papineni et al. 2002).
//!
//! Per segment: for each order n, `matches[n]` = hypothesis n-grams clipped by the largest count
//! of that n-gram in any one reference, `totals[n]` = hypothesis n-grams; the hypothesis length c
//! and the effective reference length r (the reference length closest to c, ties to the shorter;
//! or the shortest). Corpus BLEU is computed from the sums:
//! `BP * exp(sum_n ln(matches_n / totals_n) / N)`, `BP = 1` if c > r, `exp(1 - r/c)` if
//! 0 < c <= r, 0 if c = 0. Any order without a match (or without hypothesis n-grams) gives 0.

use std::fmt;
use std::str::FromStr;

use serde::{Deserialize, Serialize};

use super::{add_arrays, sub_arrays, MAX_BLEU_ORDER};

/// BLEU sufficient statistics; arrays are indexed by order - 1 and hold zeros past the
/// configured order.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq, Serialize, Deserialize)]
pub struct BleuStats {
    /// Clipped n-gram matches per order.
    pub matches: [u64; MAX_BLEU_ORDER],
    /// Hypothesis n-grams per order.
    pub totals: [u64; MAX_BLEU_ORDER],
    /// Hypothesis length in tokens.
    pub hyp_len: u64,
    /// Effective reference length in tokens.
    pub ref_len: u64,
}

impl std::ops::AddAssign for BleuStats {
    fn add_assign(&mut self, o: Self) {
        add_arrays(&mut self.matches, &o.matches);
        add_arrays(&mut self.totals, &o.totals);
        self.hyp_len += o.hyp_len;
        self.ref_len += o.ref_len;
    }
}

impl std::ops::SubAssign for BleuStats {
    fn sub_assign(&mut self, o: Self) {
        sub_arrays(&mut self.matches, &o.matches);
        sub_arrays(&mut self.totals, &o.totals);
        self.hyp_len -= o.hyp_len;
        self.ref_len -= o.ref_len;
    }
}

/// Which reference length is the effective one for the brevity penalty.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Default, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum RefLength {
    /// The reference length closest to the hypothesis length, ties to the shorter (Papineni et
    /// al. 2002's "best match length").
    #[default]
    Closest,
    /// The shortest reference length (the NIST choice).
    Shortest,
}

impl RefLength {
    /// Name on the command line and in outputs.
    pub fn name(self) -> &'static str {
        match self {
            RefLength::Closest => "closest",
            RefLength::Shortest => "shortest",
        }
    }

    /// The effective reference length for a hypothesis of `hyp_len` tokens. `ref_lens` must not
    /// be empty.
    pub fn pick(self, hyp_len: u64, ref_lens: impl IntoIterator<Item = u64>) -> u64 {
        let mut it = ref_lens.into_iter();
        let first = it.next().unwrap_or(0);
        match self {
            RefLength::Shortest => it.fold(first, u64::min),
            RefLength::Closest => it.fold(first, |best, r| {
                let (db, dr) = (best.abs_diff(hyp_len), r.abs_diff(hyp_len));
                if dr < db || (dr == db && r < best) {
                    r
                } else {
                    best
                }
            }),
        }
    }
}

impl FromStr for RefLength {
    type Err = String;
    fn from_str(s: &str) -> Result<Self, String> {
        match s {
            "closest" => Ok(RefLength::Closest),
            "shortest" => Ok(RefLength::Shortest),
            _ => Err(format!("unknown reference length rule '{s}' (choose closest or shortest)")),
        }
    }
}

impl fmt::Display for RefLength {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(self.name())
    }
}

/// Smoothing of sentence-level BLEU (Chen & Cherry 2014). Corpus BLEU is never smoothed.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Default, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum Smoothing {
    /// No smoothing: a sentence with any order without matches scores 0.
    None,
    /// Add epsilon to zero match counts (Chen & Cherry's method 1).
    #[default]
    Epsilon,
    /// Add 1 to matches and totals of orders above 1 (Lin & Och 2004; Chen & Cherry's method 2).
    PlusOne,
    /// The k-th order without matches gets precision 1 / (2^k * totals) (Chen & Cherry's method 3,
    /// the NIST geometric halving).
    NistHalving,
}

impl Smoothing {
    /// All smoothing methods, for `--help`.
    pub const ALL: [Smoothing; 4] = [Smoothing::None, Smoothing::Epsilon, Smoothing::PlusOne, Smoothing::NistHalving];

    /// Name on the command line and in outputs.
    pub fn name(self) -> &'static str {
        match self {
            Smoothing::None => "none",
            Smoothing::Epsilon => "epsilon",
            Smoothing::PlusOne => "plus-one",
            Smoothing::NistHalving => "nist-halving",
        }
    }
}

impl FromStr for Smoothing {
    type Err = String;
    fn from_str(s: &str) -> Result<Self, String> {
        Smoothing::ALL
            .into_iter()
            .find(|m| m.name() == s)
            .ok_or_else(|| format!("unknown smoothing '{s}' (choose none, epsilon, plus-one or nist-halving)"))
    }
}

impl fmt::Display for Smoothing {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(self.name())
    }
}

/// Token counts behind the brevity penalty.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct TokenCounts {
    /// Hypothesis length in tokens (c).
    pub hypothesis: u64,
    /// Effective reference length in tokens (r).
    pub reference: u64,
    /// c / r (0 when r = 0).
    pub ratio: f64,
}

/// A BLEU score derived from statistics, with its parts: what every output shows of BLEU.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct BleuScore {
    /// BLEU on a 0-100 scale (at sentence level: smoothed as configured).
    pub score: f64,
    /// Clipped n-gram matches per order 1..N.
    pub matched: Vec<u64>,
    /// Hypothesis n-grams per order 1..N.
    pub candidates: Vec<u64>,
    /// n-gram precision per order on a 0-100 scale (unsmoothed; 0 for an order without
    /// hypothesis n-grams).
    pub precision: Vec<f64>,
    /// Hypothesis and effective reference lengths.
    pub tokens: TokenCounts,
    /// The brevity penalty, 0-1.
    pub brevity: f64,
}

/// The brevity penalty for hypothesis length `c` and effective reference length `r`.
pub fn brevity_penalty(c: u64, r: u64) -> f64 {
    if c > r {
        1.0
    } else if c == 0 {
        0.0
    } else {
        (1.0 - r as f64 / c as f64).exp()
    }
}

impl BleuStats {
    /// Corpus BLEU of these statistics with max order `order` (uniform weights).
    pub fn score(&self, order: usize) -> BleuScore {
        let order = order.clamp(1, MAX_BLEU_ORDER);
        let (m, t) = (&self.matches[..order], &self.totals[..order]);
        let score = if m.contains(&0) {
            0.0
        } else {
            let log_sum: f64 = m.iter().zip(t).map(|(&m, &t)| (m as f64 / t as f64).ln()).sum();
            100.0 * brevity_penalty(self.hyp_len, self.ref_len) * (log_sum / order as f64).exp()
        };
        self.parts(order, score)
    }

    /// The parts of a BLEU score with `score` as the score.
    fn parts(&self, order: usize, score: f64) -> BleuScore {
        let (m, t) = (&self.matches[..order], &self.totals[..order]);
        BleuScore {
            score,
            matched: m.to_vec(),
            candidates: t.to_vec(),
            precision: m.iter().zip(t).map(|(&m, &t)| if t == 0 { 0.0 } else { 100.0 * m as f64 / t as f64 }).collect(),
            tokens: TokenCounts {
                hypothesis: self.hyp_len,
                reference: self.ref_len,
                ratio: if self.ref_len == 0 { 0.0 } else { self.hyp_len as f64 / self.ref_len as f64 },
            },
            brevity: brevity_penalty(self.hyp_len, self.ref_len),
        }
    }

    /// Sentence BLEU of one segment's statistics with its parts: the score smoothed as asked,
    /// the precisions unsmoothed.
    pub fn sentence(&self, order: usize, smoothing: Smoothing, epsilon: f64) -> BleuScore {
        let order = order.clamp(1, MAX_BLEU_ORDER);
        self.parts(order, self.sentence_score(order, smoothing, epsilon))
    }

    /// Sentence BLEU (0-100) of one segment's statistics with `smoothing`.
    ///
    /// Conventions at sentence level, chosen to agree with NLTK 3.10.4's `sentence_bleu`: the
    /// precision denominator of an order is at least 1 (a hypothesis shorter than n has
    /// precision 0/1 at order n), and a hypothesis without any unigram match scores 0.
    pub fn sentence_score(&self, order: usize, smoothing: Smoothing, epsilon: f64) -> f64 {
        let order = order.clamp(1, MAX_BLEU_ORDER);
        if self.matches[0] == 0 {
            return 0.0;
        }
        let mut log_sum = 0.0;
        let mut halving = 1i32;
        for n in 0..order {
            let m = self.matches[n] as f64;
            let d = self.totals[n].max(1) as f64;
            let p = match smoothing {
                Smoothing::None if m == 0.0 => return 0.0,
                Smoothing::Epsilon if m == 0.0 => epsilon / d,
                Smoothing::PlusOne if n > 0 => (m + 1.0) / (d + 1.0),
                Smoothing::NistHalving if m == 0.0 => {
                    let p = 1.0 / (2f64.powi(halving) * d);
                    halving += 1;
                    p
                }
                _ => m / d,
            };
            log_sum += p.ln();
        }
        100.0 * brevity_penalty(self.hyp_len, self.ref_len) * (log_sum / order as f64).exp()
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn stats(m: &[u64], t: &[u64], c: u64, r: u64) -> BleuStats {
        let mut s = BleuStats { hyp_len: c, ref_len: r, ..Default::default() };
        s.matches[..m.len()].copy_from_slice(m);
        s.totals[..t.len()].copy_from_slice(t);
        s
    }

    #[test]
    fn perfect_match_is_100() {
        let s = stats(&[10, 9, 8, 7], &[10, 9, 8, 7], 10, 10);
        assert!((s.score(4).score - 100.0).abs() < 1e-12);
    }

    #[test]
    fn geometric_mean_and_brevity_penalty_by_hand() {
        // p = 1/2, 1/4, 1/8, 1/16 -> geometric mean 2^-2.5; c=8, r=10 -> BP = exp(1 - 10/8).
        let s = stats(&[4, 2, 1, 1], &[8, 8, 8, 16], 8, 10);
        let expected = 100.0 * (1.0f64 - 1.25).exp() * 2f64.powf(-2.5);
        assert!((s.score(4).score - expected).abs() < 1e-9);
        assert_eq!(s.score(4).precision, vec![50.0, 25.0, 12.5, 6.25]);
        assert_eq!(s.score(4).tokens, TokenCounts { hypothesis: 8, reference: 10, ratio: 0.8 });
    }

    #[test]
    fn zero_order_or_empty_hypothesis_gives_zero() {
        assert_eq!(stats(&[5, 3, 1, 0], &[5, 4, 3, 2], 5, 5).score(4).score, 0.0);
        assert_eq!(stats(&[], &[], 0, 7).score(4).score, 0.0);
        assert_eq!(brevity_penalty(0, 7), 0.0);
        assert_eq!(brevity_penalty(8, 7), 1.0);
    }

    #[test]
    fn reference_length_rules() {
        assert_eq!(RefLength::Closest.pick(10, [7, 12, 8]), 8); // |8-10| = |12-10|: shorter wins
        assert_eq!(RefLength::Closest.pick(10, [12, 8]), 8);
        assert_eq!(RefLength::Closest.pick(10, [11, 20]), 11);
        assert_eq!(RefLength::Shortest.pick(10, [11, 20, 9]), 9);
    }

    #[test]
    fn smoothing_by_hand() {
        // 5 tokens, matches 3,1,0,0; totals 5,4,3,2.
        let s = stats(&[3, 1, 0, 0], &[5, 4, 3, 2], 5, 5);
        let e = 0.1;
        let eps = 100.0 * ((3.0f64 / 5.0) * (1.0 / 4.0) * (e / 3.0) * (e / 2.0)).powf(0.25);
        assert!((s.sentence_score(4, Smoothing::Epsilon, e) - eps).abs() < 1e-9);
        let plus = 100.0 * ((3.0f64 / 5.0) * (2.0 / 5.0) * (1.0 / 4.0) * (1.0 / 3.0)).powf(0.25);
        assert!((s.sentence_score(4, Smoothing::PlusOne, e) - plus).abs() < 1e-9);
        let halv = 100.0 * ((3.0f64 / 5.0) * (1.0 / 4.0) * (1.0 / 6.0) * (1.0 / 8.0)).powf(0.25);
        assert!((s.sentence_score(4, Smoothing::NistHalving, e) - halv).abs() < 1e-9);
        assert_eq!(s.sentence_score(4, Smoothing::None, e), 0.0);
    }

    #[test]
    fn names_round_trip() {
        for m in Smoothing::ALL {
            assert_eq!(m.name().parse::<Smoothing>().unwrap(), m);
        }
        assert!("add-k".parse::<Smoothing>().is_err());
        assert_eq!("shortest".parse::<RefLength>().unwrap(), RefLength::Shortest);
    }
}
