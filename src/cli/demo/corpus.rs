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

pub(crate) fn generate(n: usize, mean: usize, vocab: usize, refs_per_seg: usize, seed: u64) -> Corpus {
    let words: Vec<String> = (0..vocab.max(1)).map(word).collect();
    let mut cdf = Vec::with_capacity(words.len());
    let mut acc = 0.0;
    for k in 0..words.len() {
        acc += 1.0 / ((k + 1) as f64).powf(ZIPF_EXPONENT);
        cdf.push(acc);
    }
    let mut rng = SplitMix64::new(seed);
    let mut draw = |rng: &mut SplitMix64| {
        let x = rng.next_f64() * acc;
        &words[cdf.partition_point(|&c| c < x).min(words.len() - 1)]
    };
    let (lo, hi) = ((mean / 2).max(1) as u32, (mean + mean / 2).max(1) as u32);
    let mut corpus = Corpus { refs: Vec::with_capacity(n), hyps: Vec::with_capacity(n) };
    for _ in 0..n {
        let len = rng.in_range((lo, hi)) as usize;
        let base: Vec<&String> = (0..len).map(|_| draw(&mut rng)).collect();
        let mut refs = vec![join(&base)];
        for _ in 1..refs_per_seg {
            refs.push(join(&perturb(&base, &mut rng, &mut draw)));
        }
        corpus.hyps.push(join(&perturb(&base, &mut rng, &mut draw)));
        corpus.refs.push(refs);
    }
    corpus
}

fn perturb<'a>(base: &[&'a String], rng: &mut SplitMix64, draw: &mut impl FnMut(&mut SplitMix64) -> &'a String) -> Vec<&'a String> {
    let mut out = Vec::with_capacity(base.len() + 2);
    for &w in base {
        let x = rng.next_f64();
        if x < HYP_DROP {
            continue;
        }
        out.push(if x < HYP_DROP + HYP_REPLACE { draw(rng) } else { w });
        if rng.chance(HYP_INSERT) {
            out.push(draw(rng));
        }
    }
    out
}

fn join(ws: &[&String]) -> String {
    ws.iter().map(|s| s.as_str()).collect::<Vec<_>>().join(" ")
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
