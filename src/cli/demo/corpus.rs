//! Generated corpora for `bench` and `load`: invented words (syllables numbered in order),
//! drawn from a Zipf distribution, one or more references per segment, and a hypothesis made by
//! replacing, dropping and inserting words. Sample data, like the demo scenario beside it.

use crate::refs::{RefSet, SegmentInput};
use crate::rng::SplitMix64;

/// Zipf exponent of the word distribution (1.0: the classic Zipf law; common practice).
const ZIPF_EXPONENT: f64 = 1.0;
/// Share of reference tokens a hypothesis replaces, drops, or follows by an extra word.
const HYP_REPLACE: f64 = 0.15;
const HYP_DROP: f64 = 0.05;
const HYP_INSERT: f64 = 0.05;

/// A generated corpus.
pub(crate) struct Corpus {
    /// Per segment, its references (tokens joined by spaces).
    pub(crate) refs: Vec<Vec<String>>,
    /// Per segment, its hypothesis.
    pub(crate) hyps: Vec<String>,
}

fn word(mut k: usize) -> String {
    const ONSETS: [&str; 12] = ["b", "d", "f", "g", "k", "l", "m", "n", "p", "r", "s", "t"];
    const VOWELS: [&str; 5] = ["a", "e", "i", "o", "u"];
    let mut w = String::new();
    loop {
        w.push_str(ONSETS[k % ONSETS.len()]);
        k /= ONSETS.len();
        w.push_str(VOWELS[k % VOWELS.len()]);
        k /= VOWELS.len();
        if k == 0 {
            return w;
        }
        k -= 1;
    }
}

/// Invented words drawn from a Zipf distribution: word k (0-based) with weight 1 / (k + 1)^s.
pub(crate) struct Vocabulary {
    words: Vec<String>,
    cdf: Vec<f64>,
    total: f64,
}

impl Vocabulary {
    /// `size` words (at least 1).
    pub(crate) fn zipf(size: usize) -> Vocabulary {
        let words: Vec<String> = (0..size.max(1)).map(word).collect();
        let mut cdf = Vec::with_capacity(words.len());
        let mut total = 0.0;
        for k in 0..words.len() {
            total += 1.0 / ((k + 1) as f64).powf(ZIPF_EXPONENT);
            cdf.push(total);
        }
        Vocabulary { words, cdf, total }
    }

    /// The index of a word drawn at random.
    pub(crate) fn draw(&self, rng: &mut SplitMix64) -> usize {
        let x = rng.next_f64() * self.total;
        self.cdf.partition_point(|&c| c < x).min(self.words.len() - 1)
    }

    /// A reference of `lo..=hi` words (uniform length), as word indices.
    pub(crate) fn reference(&self, (lo, hi): (u32, u32), rng: &mut SplitMix64) -> Vec<usize> {
        let len = rng.in_range((lo, hi)) as usize;
        (0..len).map(|_| self.draw(rng)).collect()
    }

    /// `words` joined by single spaces into `out` (cleared first).
    pub(crate) fn join_into(&self, words: &[usize], out: &mut String) {
        out.clear();
        for (i, &w) in words.iter().enumerate() {
            if i > 0 {
                out.push(' ');
            }
            out.push_str(&self.words[w]);
        }
    }
}

/// How a hypothesis departs from its reference, per reference word: dropped with chance `drop`,
/// else replaced by a random word with chance `replace`, else kept; then followed by an extra
/// random word with chance `insert`.
#[derive(Debug, Clone, Copy, PartialEq)]
pub(crate) struct Noise {
    /// Chance a word is replaced.
    pub(crate) replace: f64,
    /// Chance a word is dropped.
    pub(crate) drop: f64,
    /// Chance an extra word follows.
    pub(crate) insert: f64,
}

/// The noise of the generated corpora's hypotheses.
pub(crate) const CORPUS_NOISE: Noise = Noise { replace: HYP_REPLACE, drop: HYP_DROP, insert: HYP_INSERT };

impl Noise {
    /// This noise with `extra` more chance of replacing a word (taken from the kept words;
    /// at most all of them).
    pub(crate) fn with_extra_replace(self, extra: f64) -> Noise {
        Noise { replace: (self.replace + extra.max(0.0)).min(1.0 - self.drop), ..self }
    }

    /// A noisy copy of `base` into `out` (cleared first).
    pub(crate) fn copy_into(&self, base: &[usize], vocab: &Vocabulary, rng: &mut SplitMix64, out: &mut Vec<usize>) {
        out.clear();
        for &w in base {
            let x = rng.next_f64();
            if x < self.drop {
                continue;
            }
            out.push(if x < self.drop + self.replace { vocab.draw(rng) } else { w });
            if rng.chance(self.insert) {
                out.push(vocab.draw(rng));
            }
        }
    }
}

/// Length range of generated references for a mean length: half to one and a half times it.
pub(crate) fn length_range(mean: usize) -> (u32, u32) {
    ((mean / 2).max(1) as u32, (mean + mean / 2).max(1) as u32)
}

pub(crate) fn generate(n: usize, mean: usize, vocab: usize, refs_per_seg: usize, seed: u64) -> Corpus {
    let vocab = Vocabulary::zipf(vocab);
    let mut rng = SplitMix64::new(seed);
    let lengths = length_range(mean);
    let mut corpus = Corpus { refs: Vec::with_capacity(n), hyps: Vec::with_capacity(n) };
    let (mut noisy, mut text) = (Vec::new(), String::new());
    for _ in 0..n {
        let base = vocab.reference(lengths, &mut rng);
        vocab.join_into(&base, &mut text);
        let mut refs = vec![text.clone()];
        for _ in 1..refs_per_seg {
            CORPUS_NOISE.copy_into(&base, &vocab, &mut rng, &mut noisy);
            vocab.join_into(&noisy, &mut text);
            refs.push(text.clone());
        }
        CORPUS_NOISE.copy_into(&base, &vocab, &mut rng, &mut noisy);
        vocab.join_into(&noisy, &mut text);
        corpus.hyps.push(text.clone());
        corpus.refs.push(refs);
    }
    corpus
}

pub(crate) fn refset(c: &Corpus) -> RefSet {
    let segs = c.refs.iter().enumerate().map(|(i, r)| SegmentInput { id: (i + 1).to_string(), source: None, refs: r.clone() });
    RefSet::new(segs).expect("generated ids are unique")
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn generated_words_are_distinct() {
        let ws: std::collections::HashSet<String> = (0..5000).map(word).collect();
        assert_eq!(ws.len(), 5000);
    }
}
