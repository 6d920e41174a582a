//! Scoring: a small reference set from fuzz data, compiled for a fuzzed configuration
//! (`Compiled::build`), scoring arbitrary hypotheses. No panic; matches never exceed totals at
//! any order; and every statistic equals a plain count made here by hand (n-gram maps), so the
//! compiled fast paths (packed keys, gram tables of every entry width) are checked, not only run.

#![no_main]

use std::collections::HashMap;
use std::hash::Hash;
use std::sync::atomic::AtomicUsize;
use std::sync::Arc;

use libfuzzer_sys::arbitrary::Unstructured;
use libfuzzer_sys::fuzz_target;
use mtgauge::metric::{
    BleuParams, ChrfParams, ChrfStats, CorpusStats, Metric, Metrics, OrderCounts, RefLength, ScoreConfig, SegmentStats, Smoothing, MAX_BLEU_ORDER,
    MAX_CHRF_CHAR_ORDER, MAX_CHRF_WORD_ORDER,
};
use mtgauge::refs::compiled::{Compiled, Scratch};
use mtgauge::refs::{RefSet, SegmentInput};
use mtgauge::text::{is_space, push_lowercased, Tokenizer};

/// Text of up to `max` characters, mostly from a small palette so that n-grams repeat and match
/// (with case pairs, space of several kinds, CJK, a character that lowercases to two).
fn text(u: &mut Unstructured<'_>, max: usize) -> String {
    const PALETTE: [&str; 16] = ["a", "b", "A", " ", " ", "Ä", "ä", ".", ",", "1", "ß", "İ", "渡", "\u{3000}", "\t", "ferry"];
    let n = u.int_in_range(0..=max).unwrap_or(0);
    let mut s = String::new();
    for _ in 0..n {
        if u.ratio(7u8, 8u8).unwrap_or(true) {
            s.push_str(u.choose(&PALETTE).copied().unwrap_or("a"));
        } else {
            s.push(u.arbitrary().unwrap_or('z'));
        }
    }
    s
}

/// A reference: usually short; sometimes a short text repeated, so that segments pass 255
/// tokens / 256 characters and use the wider table entries.
fn reference(u: &mut Unstructured<'_>) -> String {
    let base = text(u, 16);
    let times = if u.ratio(1u8, 8u8).unwrap_or(false) { u.int_in_range(2..=80usize).unwrap_or(2) } else { 1 };
    base.repeat(times)
}

/// chrF-family parameters; chrF++ has at least one word order.
fn chrf_params(u: &mut Unstructured<'_>, min_words: usize) -> ChrfParams {
    ChrfParams {
        chars: u.int_in_range(1..=MAX_CHRF_CHAR_ORDER).unwrap_or(6),
        words: u.int_in_range(min_words..=MAX_CHRF_WORD_ORDER).unwrap_or(2),
        beta: *u.choose(&[2.0, 1.0, 0.5, 3.0]).unwrap_or(&2.0),
    }
}

fn config(u: &mut Unstructured<'_>) -> ScoreConfig {
    let pick = u.int_in_range(1..=7u8).unwrap_or(7);
    let bleu = BleuParams {
        order: u.int_in_range(1..=MAX_BLEU_ORDER).unwrap_or(4),
        ref_length: if u.arbitrary().unwrap_or(false) { RefLength::Shortest } else { RefLength::Closest },
        smoothing: u.choose(&Smoothing::ALL).copied().unwrap_or_default(),
        ..BleuParams::default()
    };
    let (chrf, chrfpp) = (chrf_params(u, 0), chrf_params(u, 1));
    ScoreConfig {
        tokenizer: u.choose(&Tokenizer::ALL).copied().unwrap_or(Tokenizer::Nist),
        caseless: u.arbitrary().unwrap_or(false),
        metrics: Metrics { bleu: (pick & 1 != 0).then_some(bleu), chrf: (pick & 2 != 0).then_some(chrf), chrfpp: (pick & 4 != 0).then_some(chrfpp) },
    }
}

/// n-gram counts of `items` for n = 1..=order.
fn grams<T: Eq + Hash>(items: &[T], n: usize) -> HashMap<&[T], u64> {
    let mut m = HashMap::new();
    if n <= items.len() {
        for w in items.windows(n) {
            *m.entry(w).or_insert(0) += 1;
        }
    }
    m
}

fn ngram_count(len: usize, n: usize) -> u64 {
    (len + 1).saturating_sub(n) as u64
}

/// Clipped matches, hypothesis and reference n-grams of orders 1..=order, by hand.
fn order_counts<T: Eq + Hash>(hyp: &[T], reference: &[T], order: usize) -> OrderCounts {
    let mut c = OrderCounts::default();
    for n in 1..=order {
        let r = grams(reference, n);
        c.matches[n - 1] = grams(hyp, n).iter().map(|(g, &k)| k.min(r.get(g).copied().unwrap_or(0))).sum();
        c.hyp[n - 1] = ngram_count(hyp.len(), n);
        c.reference[n - 1] = ngram_count(reference.len(), n);
    }
    c
}

fn lowered(text: &str, lowercase: bool) -> String {
    let mut s = String::new();
    push_lowercased(text, lowercase, &mut s);
    s
}

fn chars(text: &str, lowercase: bool) -> Vec<char> {
    lowered(text, lowercase).chars().filter(|&c| !is_space(c)).collect()
}

fn words(text: &str, lowercase: bool) -> Vec<String> {
    lowered(text, lowercase).split(is_space).filter(|w| !w.is_empty()).map(str::to_owned).collect()
}

/// The statistics of `hyp` against `refs` under `c`, by hand.
fn by_hand(c: &ScoreConfig, refs: &[String], hyp: &str) -> SegmentStats {
    let mut out = SegmentStats::default();
    if let Some(bp) = c.metrics.bleu {
        let h = c.tokenizer.tokenize(hyp, c.caseless);
        let rs: Vec<Vec<String>> = refs.iter().map(|r| c.tokenizer.tokenize(r, c.caseless)).collect();
        for n in 1..=bp.order {
            // Clipping: each n-gram counts at most as often as in the one reference with most.
            let mut clip: HashMap<&[String], u64> = HashMap::new();
            for r in &rs {
                for (g, k) in grams(r, n) {
                    let e = clip.entry(g).or_insert(0);
                    *e = (*e).max(k);
                }
            }
            out.bleu.matches[n - 1] = grams(&h, n).iter().map(|(g, &k)| k.min(clip.get(g).copied().unwrap_or(0))).sum();
            out.bleu.totals[n - 1] = ngram_count(h.len(), n);
        }
        out.bleu.hyp_len = h.len() as u64;
        out.bleu.ref_len = bp.ref_length.pick(h.len() as u64, rs.iter().map(|r| r.len() as u64));
    }
    let hc = chars(hyp, c.caseless);
    let hw = words(hyp, c.caseless);
    for (metric, p) in c.chrf_family() {
        let (stats, chosen) = if metric == Metric::Chrf { (&mut out.chrf, &mut out.chrf_ref) } else { (&mut out.chrfpp, &mut out.chrfpp_ref) };
        let mut best = f64::NEG_INFINITY;
        for (k, r) in refs.iter().enumerate() {
            let st = ChrfStats { char: order_counts(&hc, &chars(r, c.caseless), p.chars), word: order_counts(&hw, &words(r, c.caseless), p.words) };
            // The first reference with the best sentence score is chosen.
            let f = st.score(p.chars, p.words, p.beta).score;
            if f > best {
                (best, *stats, *chosen) = (f, st, k as u32);
            }
        }
    }
    out
}

fn in_range(x: f64, what: &str) {
    assert!(x.is_finite() && (-1e-9..=100.0 + 1e-9).contains(&x), "{what} = {x}");
}

/// Invariants of one segment's statistics that hold whatever the texts.
fn check(c: &ScoreConfig, st: &SegmentStats, nrefs: usize) {
    let b = &st.bleu;
    for n in 0..MAX_BLEU_ORDER {
        assert!(b.matches[n] <= b.totals[n], "BLEU order {}: {} matches of {} n-grams", n + 1, b.matches[n], b.totals[n]);
        if n >= c.bleu_order() {
            assert_eq!((b.matches[n], b.totals[n]), (0, 0), "BLEU order {} past the configured order", n + 1);
        }
    }
    for (stats, params, chosen) in [(&st.chrf, c.metrics.chrf, st.chrf_ref), (&st.chrfpp, c.metrics.chrfpp, st.chrfpp_ref)] {
        let on = params.is_some();
        let p = params.unwrap_or(ChrfParams { chars: 0, words: 0, beta: 2.0 });
        for (counts, order) in [(&stats.char, p.chars), (&stats.word, p.words)] {
            for n in 0..MAX_CHRF_CHAR_ORDER {
                let (m, h, r) = (counts.matches[n], counts.hyp[n], counts.reference[n]);
                assert!(m <= h && m <= r, "chrF order {}: {m} matches, {h} hypothesis and {r} reference n-grams", n + 1);
                if n >= order || !on {
                    assert_eq!((m, h, r), (0, 0, 0), "chrF order {} past the configured order", n + 1);
                }
            }
        }
        assert!((chosen as usize) < nrefs.max(1));
        if on {
            in_range(stats.score(p.chars, p.words, p.beta).score, "chrF");
        }
    }
    if let Some(bp) = c.metrics.bleu {
        in_range(b.sentence_score(bp.order, bp.smoothing, bp.epsilon), "sentence BLEU");
        in_range(b.score(bp.order).score, "BLEU");
    }
}

fuzz_target!(|data: &[u8]| {
    let mut u = Unstructured::new(data);
    let c = config(&mut u);
    c.validate().expect("the fuzzed config is valid by construction");
    let nseg = u.int_in_range(1..=4usize).unwrap_or(1);
    let segments: Vec<SegmentInput> = (0..nseg)
        .map(|i| {
            let nrefs = u.int_in_range(1..=3usize).unwrap_or(1);
            let source = if u.arbitrary().unwrap_or(false) { Some(text(&mut u, 12)) } else { None };
            SegmentInput { id: format!("seg-{i}"), source, refs: (0..nrefs).map(|_| reference(&mut u)).collect() }
        })
        .collect();
    let set = Arc::new(RefSet::new(segments.clone()).expect("distinct ids, one reference at least"));
    let compiled = Compiled::build(Arc::clone(&set), c);
    assert!(compiled.memory_bytes() > 0 || set.is_empty());

    let mut scratch = Scratch::default();
    let mut hyps: Vec<(usize, String)> = Vec::new();
    for _ in 0..u.int_in_range(1..=6usize).unwrap_or(1) {
        let seg = u.int_in_range(0..=nseg - 1).unwrap_or(0);
        // Sometimes a reference itself, sometimes a longer text than any reference.
        let hyp = match u.int_in_range(0..=5u8).unwrap_or(0) {
            0 => segments[seg].refs[0].clone(),
            1 => text(&mut u, 24).repeat(u.int_in_range(1..=60usize).unwrap_or(1)),
            _ => text(&mut u, 24),
        };
        hyps.push((seg, hyp));
    }
    for (seg, hyp) in &hyps {
        let refs = &segments[*seg].refs;
        let st = compiled.score_segment(*seg, hyp, &mut scratch);
        check(&c, &st, refs.len());
        let want = by_hand(&c, refs, hyp);
        assert_eq!(st, want, "segment {seg}: compiled statistics differ from the count by hand\nconfig {c:?}\nrefs {refs:?}\nhyp {hyp:?}");
        if refs.contains(hyp) && c.metrics.bleu.is_some() {
            assert_eq!(st.bleu.matches, st.bleu.totals, "a hypothesis equal to a reference matches every n-gram");
        }
        // The same buffers after other work, and fresh buffers, give the same result.
        assert_eq!(compiled.score_segment(*seg, hyp, &mut Scratch::default()), st, "fresh scratch");
    }
    for (seg, hyp) in hyps.iter().rev() {
        let again = compiled.score_segment(*seg, hyp, &mut scratch);
        assert_eq!(again, by_hand(&c, &segments[*seg].refs, hyp), "reused scratch");
    }
    // Corpus paths: aligned hypotheses, summed, equal the sum of the segments.
    let aligned: Vec<&str> = hyps.iter().map(|(_, h)| h.as_str()).take(nseg).collect();
    let done = AtomicUsize::new(0);
    let per = compiled.score_aligned(&aligned, 1, &done);
    let mut sum = CorpusStats::default();
    for (i, (st, h)) in per.iter().zip(&aligned).enumerate() {
        assert_eq!(*st, compiled.score_segment(i, h, &mut scratch));
        sum.add_segment(st);
    }
    assert_eq!(compiled.score_corpus(&aligned, 1, &done), sum, "score_corpus is the sum of score_aligned");
});
