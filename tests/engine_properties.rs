//! Properties of the scoring engine, through the library API only: build a `RefSet`, compile it
//! for a `ScoreConfig`, score hypotheses, compare statistics.
//!
//! All test text is invented for this file (made-up words such as "vop", "kel", "zin" and an
//! invented ferry scenario). Case counts are bounded so the file runs in a few seconds in debug.

use std::collections::HashMap;
use std::hash::Hash;
use std::sync::atomic::AtomicUsize;
use std::sync::Arc;

use mtgauge::metric::{
    BleuParams, BleuStats, ChrfParams, ChrfStats, CorpusStats, Metrics, OrderCounts, RefLength, ScoreConfig, SegmentStats, Smoothing,
    MAX_BLEU_ORDER,
};
use mtgauge::refs::compiled::{Compiled, Scratch, SCORE_CHUNK};
use mtgauge::refs::{RefSet, SegmentInput};
use mtgauge::text::{is_space, Tokenizer};
use proptest::prelude::*;
use proptest::sample::select;

// ---------------------------------------------------------------------------------------------
// Helpers
// ---------------------------------------------------------------------------------------------

/// One test segment: its references and the hypothesis scored against it.
#[derive(Debug, Clone)]
struct Seg {
    refs: Vec<String>,
    hyp: String,
}

/// The configuration of these tests in one flat record: all three metrics, chrF and chrF++
/// sharing their character order and beta (chrF without word orders), as the naive reference
/// implementations below take it.
#[derive(Debug, Clone, Copy)]
struct Flat {
    tokenizer: Tokenizer,
    lowercase: bool,
    bleu_order: usize,
    ref_length: RefLength,
    smoothing: Smoothing,
    epsilon: f64,
    chrf_char_order: usize,
    chrf_word_order: usize,
    beta: f64,
}

impl Default for Flat {
    fn default() -> Self {
        let (b, c) = (BleuParams::default(), ChrfParams::default_for(mtgauge::metric::Metric::ChrfPlusPlus));
        Flat {
            tokenizer: Tokenizer::Nist,
            lowercase: false,
            bleu_order: b.order,
            ref_length: b.ref_length,
            smoothing: b.smoothing,
            epsilon: b.epsilon,
            chrf_char_order: c.chars,
            chrf_word_order: c.words,
            beta: c.beta,
        }
    }
}

impl Flat {
    /// The engine's configuration.
    fn build(&self) -> ScoreConfig {
        let bleu = BleuParams { order: self.bleu_order, ref_length: self.ref_length, smoothing: self.smoothing, epsilon: self.epsilon };
        let chrf = |words| ChrfParams { chars: self.chrf_char_order, words, beta: self.beta };
        let metrics = Metrics { bleu: Some(bleu), chrf: Some(chrf(0)), chrfpp: Some(chrf(self.chrf_word_order)) };
        let c = ScoreConfig { tokenizer: self.tokenizer, caseless: self.lowercase, metrics };
        c.validate().expect("valid test configuration");
        c
    }
}

fn config(tokenizer: Tokenizer) -> Flat {
    Flat { tokenizer, ..Default::default() }
}

fn refset(segs: &[Seg]) -> Arc<RefSet> {
    let inputs = segs
        .iter()
        .enumerate()
        .map(|(i, s)| SegmentInput { id: format!("seg-{i}"), source: None, refs: s.refs.clone() });
    Arc::new(RefSet::new(inputs).expect("valid reference set"))
}

fn compile(segs: &[Seg], cfg: Flat) -> Compiled {
    Compiled::build(refset(segs), cfg.build())
}

fn hyps(segs: &[Seg]) -> Vec<&str> {
    segs.iter().map(|s| s.hyp.as_str()).collect()
}

/// Per-segment statistics of `segs` under `cfg` (one thread).
fn score(segs: &[Seg], cfg: Flat) -> Vec<SegmentStats> {
    compile(segs, cfg).score_aligned(&hyps(segs), 1, &AtomicUsize::new(0))
}

fn corpus(stats: &[SegmentStats]) -> CorpusStats {
    let mut c = CorpusStats::default();
    for s in stats {
        c.add_segment(s);
    }
    c
}

/// The three corpus scores of `c` under `cfg`, in the order BLEU, chrF, chrF++.
fn corpus_scores(c: &CorpusStats, cfg: &Flat) -> [f64; 3] {
    [
        c.bleu.score(cfg.bleu_order).score,
        c.chrf.score(cfg.chrf_char_order, 0, cfg.beta).score,
        c.chrfpp.score(cfg.chrf_char_order, cfg.chrf_word_order, cfg.beta).score,
    ]
}

fn one_segment(refs: &[&str], hyp: &str, cfg: Flat) -> SegmentStats {
    let seg = Seg { refs: refs.iter().map(|r| r.to_string()).collect(), hyp: hyp.to_owned() };
    score(&[seg], cfg)[0]
}

// ---------------------------------------------------------------------------------------------
// An independent, deliberately naive model of the statistics (hash-map counting), used as the
// oracle for the whitespace tokenizer. It follows the definitions in the module docs of
// src/metric/bleu.rs and src/metric/chrf.rs, not the sort-and-merge code.
// ---------------------------------------------------------------------------------------------

fn ngram_counts<T: Hash + Eq + Clone>(seq: &[T], n: usize) -> HashMap<Vec<T>, u64> {
    let mut m = HashMap::new();
    if n > 0 && seq.len() >= n {
        for w in seq.windows(n) {
            *m.entry(w.to_vec()).or_insert(0) += 1;
        }
    }
    m
}

fn lower(text: &str, lowercase: bool) -> String {
    if lowercase {
        text.to_lowercase()
    } else {
        text.to_owned()
    }
}

fn words(text: &str) -> Vec<String> {
    text.split(is_space).filter(|w| !w.is_empty()).map(str::to_owned).collect()
}

fn naive_bleu(refs: &[String], hyp: &str, cfg: &Flat) -> BleuStats {
    let h = words(&lower(hyp, cfg.lowercase));
    let rs: Vec<Vec<String>> = refs.iter().map(|r| words(&lower(r, cfg.lowercase))).collect();
    let mut st = BleuStats::default();
    for n in 1..=cfg.bleu_order {
        let hc = ngram_counts(&h, n);
        let rcs: Vec<_> = rs.iter().map(|r| ngram_counts(r, n)).collect();
        let mut m = 0;
        for (g, &c) in &hc {
            let max_ref = rcs.iter().map(|rc| rc.get(g).copied().unwrap_or(0)).max().unwrap_or(0);
            m += c.min(max_ref);
        }
        st.matches[n - 1] = m;
        st.totals[n - 1] = (h.len() + 1).saturating_sub(n) as u64;
    }
    st.hyp_len = h.len() as u64;
    let c = st.hyp_len;
    let lens = rs.iter().map(|r| r.len() as u64);
    st.ref_len = match cfg.ref_length {
        RefLength::Shortest => lens.min().unwrap(),
        RefLength::Closest => lens.min_by_key(|&r| (r.abs_diff(c), r)).unwrap(),
    };
    st
}

fn naive_orders<T: Hash + Eq + Clone>(h: &[T], r: &[T], orders: usize) -> OrderCounts {
    let mut oc = OrderCounts::default();
    for n in 1..=orders {
        let (hc, rc) = (ngram_counts(h, n), ngram_counts(r, n));
        oc.matches[n - 1] = hc.iter().map(|(g, &c)| c.min(rc.get(g).copied().unwrap_or(0))).sum();
        oc.hyp[n - 1] = hc.values().sum();
        oc.reference[n - 1] = rc.values().sum();
    }
    oc
}

/// (chrF stats, chosen ref, chrF++ stats, chosen ref).
fn naive_chrf(refs: &[String], hyp: &str, cfg: &Flat) -> (ChrfStats, u32, ChrfStats, u32) {
    let chars = |t: &str| -> Vec<char> { lower(t, cfg.lowercase).chars().filter(|&c| !is_space(c)).collect() };
    let (hc, hw) = (chars(hyp), words(&lower(hyp, cfg.lowercase)));
    let mut best = (f64::NEG_INFINITY, ChrfStats::default(), 0u32);
    let mut best_pp = (f64::NEG_INFINITY, ChrfStats::default(), 0u32);
    for (k, r) in refs.iter().enumerate() {
        let c = naive_orders(&hc, &chars(r), cfg.chrf_char_order);
        let plain = ChrfStats { char: c, word: OrderCounts::default() };
        let f = plain.score(cfg.chrf_char_order, 0, cfg.beta).score;
        if f > best.0 {
            best = (f, plain, k as u32);
        }
        let w = naive_orders(&hw, &words(&lower(r, cfg.lowercase)), cfg.chrf_word_order);
        let pp = ChrfStats { char: c, word: w };
        let f = pp.score(cfg.chrf_char_order, cfg.chrf_word_order, cfg.beta).score;
        if f > best_pp.0 {
            best_pp = (f, pp, k as u32);
        }
    }
    (best.1, best.2, best_pp.1, best_pp.2)
}

fn naive_segment(seg: &Seg, cfg: &Flat) -> SegmentStats {
    let (chrf, chrf_ref, chrfpp, chrfpp_ref) = naive_chrf(&seg.refs, &seg.hyp, cfg);
    SegmentStats { bleu: naive_bleu(&seg.refs, &seg.hyp, cfg), chrf, chrf_ref, chrfpp, chrfpp_ref }
}

// ---------------------------------------------------------------------------------------------
// Strategies
// ---------------------------------------------------------------------------------------------

/// Invented words (a small vocabulary so that n-grams repeat and match), with some non-ASCII
/// letters, a combining sequence, CJK and an emoji.
const VOCAB: &[&str] = &[
    "vop", "kel", "zin", "Vop", "tarn", "ÆRØ", "straße", "fjå", "e\u{301}", "渡", "轮", "🚢", "kel.", "'zin'", "14:30",
];
/// Separators: ASCII and Unicode white space (all of them white space for mtgauge).
const SEPARATORS: &[&str] = &[" ", " ", " ", "  ", "\t", "\u{3000}", "\u{A0}", "\u{1F}"];

fn sentence(max_words: usize) -> impl Strategy<Value = String> {
    proptest::collection::vec((select(VOCAB), select(SEPARATORS)), 0..=max_words).prop_map(|ws| {
        let mut s = String::new();
        for (i, (w, sep)) in ws.iter().enumerate() {
            if i > 0 {
                s.push_str(sep);
            }
            s.push_str(w);
        }
        s
    })
}

/// A segment whose hypothesis is often a light edit of its first reference (so that matches
/// of every order occur), sometimes unrelated.
fn segment() -> impl Strategy<Value = Seg> {
    (proptest::collection::vec(sentence(10), 1..=3), sentence(10), any::<bool>(), 0usize..4).prop_map(
        |(refs, other, related, cut)| {
            let hyp = if related {
                let mut w = words(&refs[0]);
                let keep = w.len().saturating_sub(cut);
                w.truncate(keep);
                w.extend(words(&other).into_iter().take(cut));
                w.join(" ")
            } else {
                other
            };
            Seg { refs, hyp }
        },
    )
}

fn corpus_strategy(max: usize) -> impl Strategy<Value = Vec<Seg>> {
    proptest::collection::vec(segment(), 1..=max)
}

fn any_tokenizer() -> impl Strategy<Value = Tokenizer> {
    select(Tokenizer::ALL.to_vec())
}

/// A random valid configuration (all metrics, every order range, both length rules).
fn any_config(tokenizer: impl Strategy<Value = Tokenizer>) -> impl Strategy<Value = Flat> {
    (
        tokenizer,
        any::<bool>(),
        1usize..=MAX_BLEU_ORDER,
        select(vec![RefLength::Closest, RefLength::Shortest]),
        1usize..=10,
        1usize..=4,
        select(vec![0.5, 1.0, 2.0, 3.0]),
    )
        .prop_map(|(tokenizer, lowercase, bleu_order, ref_length, chrf_char_order, chrf_word_order, beta)| Flat {
            tokenizer,
            lowercase,
            bleu_order,
            ref_length,
            chrf_char_order,
            chrf_word_order,
            beta,
            ..Default::default()
        })
}

/// Any Unicode scalar value, weighted towards the awkward ones: C0/C1 controls, white space of
/// every kind, combining marks, zero-width joiners and the BOM, emoji, CJK and hangul, and the
/// characters whose lowercase form is longer than themselves.
fn awkward_char() -> impl Strategy<Value = char> {
    prop_oneof![
        3 => any::<char>(),
        2 => proptest::char::range('\u{0}', '\u{7F}'),
        1 => proptest::char::range('\u{80}', '\u{9F}'),
        1 => select(vec![
            '\u{A0}', '\u{85}', '\u{1680}', '\u{2000}', '\u{200A}', '\u{2028}', '\u{2029}', '\u{202F}', '\u{205F}',
            '\u{3000}', '\u{1C}', '\u{1D}', '\u{1E}', '\u{1F}', '\u{200B}', '\u{200D}', '\u{FEFF}', '\u{FFFD}', 'İ',
            'ẞ', 'Σ', 'ﬃ', '&', ';', '<', '>', '.', ',', '-', '\'', '\u{10FFFF}',
        ]),
        2 => proptest::char::range('\u{300}', '\u{36F}'),
        2 => proptest::char::range('\u{1F300}', '\u{1FAFF}'),
        2 => proptest::char::range('\u{4E00}', '\u{9FFF}'),
        1 => proptest::char::range('\u{AC00}', '\u{D7A3}'),
        1 => proptest::char::range('\u{3000}', '\u{30FF}'),
        1 => proptest::char::range('\u{FF00}', '\u{FFEF}'),
        1 => proptest::char::range('\u{20000}', '\u{2A6DF}'),
    ]
}

fn awkward_string(max: usize) -> impl Strategy<Value = String> {
    prop_oneof![
        4 => proptest::collection::vec(awkward_char(), 0..=max).prop_map(|v| v.into_iter().collect::<String>()),
        // Entity-like and marker-like fragments the NIST rules rewrite.
        1 => proptest::collection::vec(
            select(vec!["&lt;", "&amp;lt;", "&#91;", "<skipped>", "&quot;", "1,5", "a.", "3-", "x", " ", "\u{2028}"]),
            0..=12
        )
        .prop_map(|v| v.concat()),
    ]
}

// ---------------------------------------------------------------------------------------------
// Hand-computed checks
// ---------------------------------------------------------------------------------------------

#[test]
fn hand_computed_short_hypothesis_and_brevity_penalty() {
    let cfg = config(Tokenizer::Whitespace);
    let s = one_segment(&["a b c d e f"], "a b c d", cfg);
    assert_eq!(&s.bleu.matches[..4], &[4, 3, 2, 1]);
    assert_eq!(&s.bleu.totals[..4], &[4, 3, 2, 1]);
    assert_eq!(&s.bleu.matches[4..], &[0; MAX_BLEU_ORDER - 4], "orders past the configured one stay zero");
    assert_eq!((s.bleu.hyp_len, s.bleu.ref_len), (4, 6));
    let b = corpus(&[s]).bleu.score(4);
    // Brevity penalty (Papineni et al. 2002, section 2.2.2): c = 4 <= r = 6, so
    // BP = exp(1 - r/c) = exp(1 - 6/4) = exp(-0.5) = 0.60653065971...
    let bp = (1.0f64 - 6.0 / 4.0).exp();
    assert!((b.brevity - bp).abs() < 1e-12, "{}", b.brevity);
    assert!((bp - 0.606_530_659_7).abs() < 1e-9);
    // Every precision is 1, so BLEU = 100 * BP * exp(0) = 60.653...
    assert_eq!(b.precision, vec![100.0; 4]);
    assert!((b.score - 100.0 * bp).abs() < 1e-9, "{}", b.score);
    assert!((b.tokens.ratio - 4.0 / 6.0).abs() < 1e-12);
}

#[test]
fn hand_computed_clipping_takes_the_max_count_in_any_one_reference() {
    let cfg = config(Tokenizer::Whitespace);
    let s = one_segment(&["vop zin", "vop vop kel"], "vop vop vop zin", cfg);
    // Unigrams: vop x3 clipped to max(1, 2) = 2, zin x1 clipped to max(1, 0) = 1 -> 3.
    // Bigrams: "vop vop" x2 clipped to max(0, 1) = 1, "vop zin" x1 clipped to max(1, 0) = 1 -> 2.
    // Trigrams "vop vop vop", "vop vop zin" and the 4-gram occur in no reference -> 0.
    assert_eq!(&s.bleu.matches[..4], &[3, 2, 0, 0]);
    assert_eq!(&s.bleu.totals[..4], &[4, 3, 2, 1]);
    // Lengths 2 and 3 against c = 4: |3 - 4| = 1 is closest.
    assert_eq!((s.bleu.hyp_len, s.bleu.ref_len), (4, 3));
    let b = corpus(&[s]).bleu.score(4);
    assert_eq!(b.score, 0.0, "an order without matches gives corpus BLEU 0");
    assert!((b.precision[0] - 75.0).abs() < 1e-12);
    assert!((b.precision[1] - 200.0 / 3.0).abs() < 1e-12);
    assert_eq!(&b.precision[2..], &[0.0, 0.0]);
    assert_eq!(b.brevity, 1.0, "c = 4 > r = 3");
}

#[test]
fn closest_reference_length_ties_go_to_the_shorter() {
    let cfg = config(Tokenizer::Whitespace);
    // c = 5; references of 4 and 6 tokens are both 1 away: the shorter (4) wins, in either order.
    let four = "kel vop zin tarn";
    let six = "kel vop zin tarn fjå zin";
    for refs in [[four, six], [six, four]] {
        let s = one_segment(&refs, "kel vop zin tarn fjå", cfg);
        assert_eq!((s.bleu.hyp_len, s.bleu.ref_len), (5, 4), "{refs:?}");
    }
    // Not a tie: 7 is 2 away, 6 is 1 away.
    let s = one_segment(&["a b c d e f g", "a b c d e f"], "a b c d e", cfg);
    assert_eq!(s.bleu.ref_len, 6);
    // The shortest rule ignores the hypothesis length.
    let cfg = Flat { ref_length: RefLength::Shortest, ..cfg };
    let s = one_segment(&["a b c d e f g", "a b c"], "a b c d e f g", cfg);
    assert_eq!(s.bleu.ref_len, 3);
}

#[test]
fn hand_computed_chrf() {
    // chrF with character orders 1-2, beta 2. Hypothesis "ab", reference "abc":
    // order 1: matches 2, hyp 2, ref 3; order 2: "ab" matches 1, hyp 1, ref 2.
    // P = (2/2 + 1/1) / 2 = 1; R = (2/3 + 1/2) / 2 = 7/12;
    // F2 = (1 + 4) P R / (4 P + R) = (35/12) / (55/12) = 7/11.
    let cfg = Flat { chrf_char_order: 2, ..config(Tokenizer::Whitespace) };
    let s = one_segment(&["abc"], "ab", cfg);
    assert_eq!(&s.chrf.char.matches[..2], &[2, 1]);
    assert_eq!(&s.chrf.char.hyp[..2], &[2, 1]);
    assert_eq!(&s.chrf.char.reference[..2], &[3, 2]);
    let f = s.chrf.score(2, 0, 2.0).score;
    assert!((f - 700.0 / 11.0).abs() < 1e-9, "{f}");

    // White space is removed before character n-grams are taken: "ab cd" equals "abcd" for chrF,
    // while their words differ.
    let cfg = config(Tokenizer::Whitespace);
    let s = one_segment(&["abcd"], "ab cd", cfg);
    assert!((s.chrf.score(6, 0, 2.0).score - 100.0).abs() < 1e-9);
    assert_eq!(s.bleu.matches[0], 0);

    // chrF++ with one character order and two word orders: "kel vop" against "vop kel".
    // chars: 6 of 6 match (P = R = 1); words order 1: 2 of 2; order 2: "kel vop" vs "vop kel": 0 of 1.
    // P = R = (1 + 1 + 0) / 3 = 2/3, so F = 2/3 for any beta.
    let cfg = Flat { chrf_char_order: 1, chrf_word_order: 2, ..config(Tokenizer::Whitespace) };
    let s = one_segment(&["vop kel"], "kel vop", cfg);
    assert_eq!(&s.chrfpp.word.matches[..2], &[2, 0]);
    assert_eq!(&s.chrfpp.word.hyp[..2], &[2, 1]);
    let f = s.chrfpp.score(1, 2, 2.0).score;
    assert!((f - 200.0 / 3.0).abs() < 1e-9, "{f}");
    assert_eq!(s.chrf.word, OrderCounts::default(), "plain chrF carries no word counts");
}

#[test]
fn chrf_picks_the_best_reference_first_on_a_tie() {
    let cfg = config(Tokenizer::Whitespace);
    let s = one_segment(&["zin tarn", "kel vop fjå", "kel vop fjå"], "kel vop fjå", cfg);
    assert_eq!(s.chrf_ref, 1);
    assert_eq!(s.chrfpp_ref, 1);
    assert!((s.chrf.score(6, 0, 2.0).score - 100.0).abs() < 1e-9);
}

#[test]
fn lowercase_applies_to_every_metric() {
    let hyp = "KEL Vop ÆRØ";
    let r = ["kel vop ærø"];
    let on = one_segment(&r, hyp, Flat { lowercase: true, ..config(Tokenizer::Whitespace) });
    assert_eq!(on.bleu.matches[..3], [3, 2, 1]);
    assert!((on.chrf.score(6, 0, 2.0).score - 100.0).abs() < 1e-9);
    assert!((on.chrfpp.score(6, 2, 2.0).score - 100.0).abs() < 1e-9);
    let off = one_segment(&r, hyp, config(Tokenizer::Whitespace));
    assert_eq!(off.bleu.matches[0], 0);
    assert!(off.chrf.score(6, 0, 2.0).score < 100.0);
}

#[test]
fn unknown_and_empty_hypotheses() {
    let cfg = config(Tokenizer::Nist);
    let s = one_segment(&["the ferry to Kelmø leaves at 14:30."], "", cfg);
    assert_eq!(s.bleu, BleuStats { ref_len: s.bleu.ref_len, ..Default::default() });
    assert!(s.bleu.ref_len > 0);
    assert_eq!(corpus(&[s]).bleu.score(4).score, 0.0);
    assert_eq!(s.chrf.score(6, 0, 2.0).score, 0.0);
    // Tokens that occur in no reference never match, even each other.
    let s = one_segment(&["vop kel"], "qqq qqq qqq qqq", cfg);
    assert_eq!(&s.bleu.matches[..4], &[0; 4]);
    assert_eq!(&s.bleu.totals[..4], &[4, 3, 2, 1]);
}

#[test]
fn thread_count_does_not_change_a_large_corpus() {
    // Several work chunks, so that 2 and 4 threads really split the work.
    let n = 2 * SCORE_CHUNK + 777;
    let segs: Vec<Seg> = (0..n)
        .map(|i| {
            let w = |k: usize| VOCAB[(i * 7 + k * 3) % VOCAB.len()];
            Seg {
                refs: vec![format!("{} {} {} {} {}", w(0), w(1), w(2), w(3), w(4)), format!("{} {} {}", w(2), w(5), w(1))],
                hyp: format!("{} {} {} {}", w(0), w(1), w(i % 5), w(3)),
            }
        })
        .collect();
    let c = compile(&segs, config(Tokenizer::Nist));
    let h = hyps(&segs);
    let done = AtomicUsize::new(0);
    let one = c.score_aligned(&h, 1, &done);
    assert_eq!(done.into_inner(), n);
    assert_eq!(one.len(), n);
    for t in [2, 4] {
        assert_eq!(c.score_aligned(&h, t, &AtomicUsize::new(0)), one, "{t} threads");
        assert_eq!(c.score_corpus(&h, t, &AtomicUsize::new(0)), corpus(&one), "score_corpus, {t} threads");
    }
    // Per-segment results are in segment order: spot-check against scoring alone.
    let mut scratch = Scratch::default();
    for i in [0, SCORE_CHUNK - 1, SCORE_CHUNK, n - 1] {
        assert_eq!(c.score_segment(i, h[i], &mut scratch), one[i], "segment {i}");
    }
}

// ---------------------------------------------------------------------------------------------
// Properties
// ---------------------------------------------------------------------------------------------

proptest! {
    #![proptest_config(ProptestConfig { cases: 96, ..ProptestConfig::default() })]

    /// The engine agrees with the naive hash-map model on every integer field, for random
    /// orders, length rules, beta, lowercasing and 1-3 references.
    #[test]
    fn statistics_equal_the_naive_model(segs in corpus_strategy(5), cfg in any_config(Just(Tokenizer::Whitespace))) {
        let got = score(&segs, cfg);
        for (i, seg) in segs.iter().enumerate() {
            prop_assert_eq!(got[i], naive_segment(seg, &cfg), "segment {}: {:?}", i, seg);
        }
    }

    /// chrF and chrF++ with parameters of their own in one configuration: each metric's
    /// statistics and chosen reference are what a configuration of that metric alone gives
    /// (the engine counts to the largest orders once and keeps each metric's own).
    #[test]
    fn chrf_family_metrics_with_their_own_parameters(segs in corpus_strategy(5),
                                                     a in (1usize..=10, 0usize..=4, select(vec![0.5, 1.0, 2.0, 3.0])),
                                                     b in (1usize..=10, 1usize..=4, select(vec![0.5, 1.0, 2.0, 3.0])),
                                                     caseless in any::<bool>()) {
        let chrf = ChrfParams { chars: a.0, words: a.1, beta: a.2 };
        let chrfpp = ChrfParams { chars: b.0, words: b.1, beta: b.2 };
        let cfg = |m: Metrics| {
            let c = ScoreConfig { tokenizer: Tokenizer::Whitespace, caseless, metrics: m };
            c.validate().expect("valid");
            c
        };
        let run = |c: ScoreConfig| Compiled::build(refset(&segs), c).score_aligned(&hyps(&segs), 1, &AtomicUsize::new(0));
        let both = run(cfg(Metrics { bleu: None, chrf: Some(chrf), chrfpp: Some(chrfpp) }));
        let alone_c = run(cfg(Metrics { bleu: None, chrf: Some(chrf), chrfpp: None }));
        let alone_pp = run(cfg(Metrics { bleu: None, chrf: None, chrfpp: Some(chrfpp) }));
        for i in 0..segs.len() {
            prop_assert_eq!((both[i].chrf, both[i].chrf_ref), (alone_c[i].chrf, alone_c[i].chrf_ref), "chrF of segment {}", i);
            prop_assert_eq!((both[i].chrfpp, both[i].chrfpp_ref), (alone_pp[i].chrfpp, alone_pp[i].chrfpp_ref), "chrF++ of segment {}", i);
            // Nothing past a metric's own orders.
            prop_assert!(both[i].chrf.char.hyp[a.0..].iter().chain(&both[i].chrf.word.hyp[a.1..]).all(|&x| x == 0));
            prop_assert!(both[i].chrfpp.char.hyp[b.0..].iter().chain(&both[i].chrfpp.word.hyp[b.1..]).all(|&x| x == 0));
        }
        // And chrF++ alone equals the naive model of the flat configuration with those orders.
        let flat = Flat { tokenizer: Tokenizer::Whitespace, lowercase: caseless, chrf_char_order: b.0, chrf_word_order: b.1, beta: b.2, ..Default::default() };
        for (i, seg) in segs.iter().enumerate() {
            let want = naive_segment(seg, &flat);
            prop_assert_eq!((alone_pp[i].chrfpp, alone_pp[i].chrfpp_ref), (want.chrfpp, want.chrfpp_ref), "segment {}", i);
        }
    }

    /// Identical hypothesis and reference: BLEU 100 when there are at least `order` tokens (else
    /// 0: no n-grams of the top order), chrF and chrF++ 100 whenever there is a non-space
    /// character.
    #[test]
    fn identity_scores_100(text in prop_oneof![sentence(12), awkward_string(24)], cfg in any_config(any_tokenizer()),
                           extra in sentence(6)) {
        // The identical reference may come with an unrelated second reference.
        let refs = if extra.is_empty() { vec![text.as_str()] } else { vec![text.as_str(), extra.as_str()] };
        let s = one_segment(&refs, &text, cfg);
        let c = corpus(&[s]);
        let [bleu, chrf, chrfpp] = corpus_scores(&c, &cfg);
        let tokens = cfg.tokenizer.tokenize(&text, cfg.lowercase).len();
        prop_assert_eq!(s.bleu.hyp_len, tokens as u64);
        if cfg.ref_length == RefLength::Closest {
            prop_assert_eq!(s.bleu.ref_len, tokens as u64, "the identical reference is the closest");
        } else {
            prop_assert!(s.bleu.ref_len <= tokens as u64, "the shortest is at most the identical one");
        }
        if tokens >= cfg.bleu_order {
            prop_assert!((bleu - 100.0).abs() < 1e-9, "BLEU {} for {:?}", bleu, text);
        } else {
            prop_assert_eq!(bleu, 0.0);
        }
        if lower(&text, cfg.lowercase).chars().any(|c| !is_space(c)) {
            prop_assert!((chrf - 100.0).abs() < 1e-9, "chrF {} for {:?}", chrf, text);
            prop_assert!((chrfpp - 100.0).abs() < 1e-9, "chrF++ {} for {:?}", chrfpp, text);
        } else {
            prop_assert_eq!(chrf, 0.0);
            prop_assert_eq!(chrfpp, 0.0);
        }
    }

    /// Statistics are additive: the statistics of a concatenated corpus are the sum of its parts'
    /// (each part compiled on its own), exactly; `sub_segment` undoes `add_segment`.
    #[test]
    fn concatenation_adds_statistics(a in corpus_strategy(5), b in corpus_strategy(5), cfg in any_config(any_tokenizer())) {
        let (sa, sb) = (score(&a, cfg), score(&b, cfg));
        let ab: Vec<Seg> = a.iter().chain(&b).cloned().collect();
        let sab = score(&ab, cfg);
        prop_assert_eq!(&sab[..a.len()], &sa[..]);
        prop_assert_eq!(&sab[a.len()..], &sb[..]);
        let (ca, cb, cab) = (corpus(&sa), corpus(&sb), corpus(&sab));
        prop_assert_eq!(ca + cb, cab);
        prop_assert_eq!([ca, cb].into_iter().sum::<CorpusStats>(), cab);
        let mut acc = ca;
        acc += cb;
        prop_assert_eq!(acc, cab);
        prop_assert_eq!(cab.segments, (a.len() + b.len()) as u64);
        // Spelled out for the scalar fields too, so a failure names the field.
        prop_assert_eq!(cab.bleu.hyp_len, ca.bleu.hyp_len + cb.bleu.hyp_len);
        prop_assert_eq!(cab.bleu.ref_len, ca.bleu.ref_len + cb.bleu.ref_len);
        for n in 0..MAX_BLEU_ORDER {
            prop_assert_eq!(cab.bleu.matches[n], ca.bleu.matches[n] + cb.bleu.matches[n]);
            prop_assert_eq!(cab.bleu.totals[n], ca.bleu.totals[n] + cb.bleu.totals[n]);
        }
        let mut back = cab;
        for s in &sb {
            back.sub_segment(s);
        }
        prop_assert_eq!(back, ca);
    }

    /// Segment order never matters for the corpus statistics or scores.
    #[test]
    fn permuting_segments_changes_nothing(
        (segs, perm) in corpus_strategy(8).prop_flat_map(|s| {
            let idx: Vec<usize> = (0..s.len()).collect();
            (Just(s), Just(idx).prop_shuffle())
        }),
        cfg in any_config(any_tokenizer()),
    ) {
        let permuted: Vec<Seg> = perm.iter().map(|&i| segs[i].clone()).collect();
        let (s0, s1) = (score(&segs, cfg), score(&permuted, cfg));
        for (k, &i) in perm.iter().enumerate() {
            prop_assert_eq!(s1[k], s0[i]);
        }
        let (c0, c1) = (corpus(&s0), corpus(&s1));
        prop_assert_eq!(c0, c1);
        // Exact equality: the scores are functions of the (equal) integer statistics.
        prop_assert_eq!(corpus_scores(&c0, &cfg), corpus_scores(&c1, &cfg));
        let compiled = compile(&permuted, cfg);
        prop_assert_eq!(compiled.score_corpus(&hyps(&permuted), 1, &AtomicUsize::new(0)), c0);
    }

    /// `score_aligned` on 1, 2 and 4 threads gives the same per-segment results, and so does
    /// scoring each segment on its own with a fresh scratch buffer (no state leaks between
    /// segments through the reused buffers).
    #[test]
    fn threads_and_scratch_reuse_do_not_matter(segs in corpus_strategy(12), cfg in any_config(any_tokenizer())) {
        let c = compile(&segs, cfg);
        let h = hyps(&segs);
        let one = c.score_aligned(&h, 1, &AtomicUsize::new(0));
        for t in [2, 4] {
            prop_assert_eq!(&c.score_aligned(&h, t, &AtomicUsize::new(0)), &one);
        }
        for (i, hyp) in h.iter().enumerate() {
            prop_assert_eq!(c.score_segment(i, hyp, &mut Scratch::default()), one[i]);
        }
        // A prefix of the hypotheses scores the prefix of the segments.
        let k = h.len() / 2;
        prop_assert_eq!(&c.score_aligned(&h[..k], 2, &AtomicUsize::new(0))[..], &one[..k]);
    }
}

proptest! {
    #![proptest_config(ProptestConfig { cases: 160, ..ProptestConfig::default() })]

    /// Every tokenizer accepts any UTF-8 text: no panic, no empty token, no token with white
    /// space, and the buffer API agrees with the owned one.
    #[test]
    fn tokenizers_never_panic(text in awkward_string(40), lowercase in any::<bool>()) {
        let mut buf = mtgauge::text::TokenBuf::default();
        for t in Tokenizer::ALL {
            let toks = t.tokenize(&text, lowercase);
            for tok in &toks {
                prop_assert!(!tok.is_empty(), "{}: empty token from {:?}", t, text);
                prop_assert!(!tok.chars().any(is_space), "{}: token {:?} has white space", t, tok);
            }
            t.tokenize_into(&text, lowercase, &mut buf);
            prop_assert_eq!(buf.len(), toks.len());
            prop_assert!(buf.tokens().eq(toks.iter().map(String::as_str)));
        }
    }

    /// Scoring any UTF-8 references and hypotheses, under any tokenizer and configuration, does
    /// not panic and gives consistent statistics and scores in range.
    #[test]
    fn scoring_never_panics(
        refs in proptest::collection::vec(proptest::collection::vec(awkward_string(30), 1..=3), 1..=4),
        hyp_pool in proptest::collection::vec(awkward_string(30), 4),
        cfg in any_config(any_tokenizer()),
    ) {
        let segs: Vec<Seg> = refs.into_iter().zip(hyp_pool).map(|(refs, hyp)| Seg { refs, hyp }).collect();
        let stats = score(&segs, cfg);
        for (seg, s) in segs.iter().zip(&stats) {
            let b = &s.bleu;
            prop_assert_eq!(b.hyp_len, cfg.tokenizer.tokenize(&seg.hyp, cfg.lowercase).len() as u64);
            for n in 1..=MAX_BLEU_ORDER {
                let want = if n <= cfg.bleu_order { (b.hyp_len + 1).saturating_sub(n as u64) } else { 0 };
                prop_assert_eq!(b.totals[n - 1], want);
                prop_assert!(b.matches[n - 1] <= b.totals[n - 1]);
            }
            let ref_lens: Vec<u64> = seg.refs.iter().map(|r| cfg.tokenizer.tokenize(r, cfg.lowercase).len() as u64).collect();
            prop_assert!(ref_lens.contains(&b.ref_len));
            let hyp_chars = lower(&seg.hyp, cfg.lowercase).chars().filter(|&c| !is_space(c)).count() as u64;
            for st in [&s.chrf, &s.chrfpp] {
                prop_assert_eq!(st.char.hyp[0], hyp_chars);
                for n in 0..cfg.chrf_char_order {
                    prop_assert!(st.char.matches[n] <= st.char.hyp[n].min(st.char.reference[n]));
                }
            }
            prop_assert!((s.chrf_ref as usize) < seg.refs.len() && (s.chrfpp_ref as usize) < seg.refs.len());
            let sentence = b.sentence_score(cfg.bleu_order, cfg.smoothing, cfg.epsilon);
            prop_assert!(sentence.is_finite() && (0.0..=100.0 + 1e-9).contains(&sentence), "sentence BLEU {}", sentence);
        }
        for x in corpus_scores(&corpus(&stats), &cfg) {
            prop_assert!(x.is_finite() && (0.0..=100.0 + 1e-9).contains(&x), "score {}", x);
        }
    }
}

// ---------------------------------------------------------------------------------------------
// The one-shot path (refs::oneshot) against the compiled engine: the same integer statistics.
// ---------------------------------------------------------------------------------------------

use mtgauge::refs::oneshot::{self, SegmentScratch, ONESHOT_CHUNK};

/// `cfg` with only the metrics `mask` picks (bit 0 BLEU, 1 chrF, 2 chrF++; never none).
fn only(cfg: Flat, mask: u8) -> ScoreConfig {
    let mut c = cfg.build();
    let mask = if mask & 7 == 0 { 7 } else { mask };
    if mask & 1 == 0 {
        c.metrics.bleu = None;
    }
    if mask & 2 == 0 {
        c.metrics.chrf = None;
    }
    if mask & 4 == 0 {
        c.metrics.chrfpp = None;
    }
    c
}

/// Every segment scored by `oneshot::score_segment` (one scratch reused over all of them)
/// equals `Compiled::score_segment`.
fn assert_segments_equal(segs: &[Seg], c: ScoreConfig) {
    let compiled = Compiled::build(refset(segs), c);
    let (mut s, mut scratch) = (SegmentScratch::default(), Scratch::default());
    for (i, seg) in segs.iter().enumerate() {
        let refs: Vec<&str> = seg.refs.iter().map(String::as_str).collect();
        let mut got = SegmentStats::default();
        oneshot::score_segment(&c, &refs, &seg.hyp, &mut s, &mut got);
        assert_eq!(got, compiled.score_segment(i, &seg.hyp, &mut scratch), "segment {i} under {c:?}");
    }
}

/// Plain reference streams (`streams` of them; segment i's reference k is its k-th, or its first
/// when it has fewer) and the hypothesis file of `segs`, lines ended by `eol`, `bom` first.
fn plain_files(segs: &[Seg], streams: usize, eol: &str, bom: bool) -> (Vec<Vec<u8>>, Vec<u8>) {
    let clean = |t: &str| t.replace(['\n', '\r'], " ");
    let file = |lines: &mut dyn Iterator<Item = String>| {
        let mut f = if bom { "\u{FEFF}".to_owned() } else { String::new() };
        for l in lines {
            f.push_str(&l);
            f.push_str(eol);
        }
        f.into_bytes()
    };
    let refs = (0..streams).map(|k| file(&mut segs.iter().map(|s| clean(s.refs.get(k).unwrap_or(&s.refs[0]))))).collect();
    (refs, file(&mut segs.iter().map(|s| clean(&s.hyp))))
}

/// `oneshot::score_plain` on 1, 2 and 3 threads equals the long way: the files loaded into a
/// `RefSet` (its digest) and `Compiled::score_corpus` over the split hypothesis lines.
fn assert_plain_equal(refs: &[Vec<u8>], hyp: &[u8], c: ScoreConfig) {
    let named: Vec<(&str, &[u8])> = refs.iter().map(|r| ("ref", r.as_slice())).collect();
    let set = Arc::new(mtgauge::refs::load(mtgauge::refs::RefFormat::Plain, &named, None).expect("valid files"));
    let lines = mtgauge::refs::split_lines("hyp", hyp).expect("valid hypothesis");
    let want = Compiled::build(Arc::clone(&set), c).score_corpus(&lines, 1, &AtomicUsize::new(0));
    let slices: Vec<&[u8]> = refs.iter().map(Vec::as_slice).collect();
    for threads in [1, 2, 3] {
        let done = AtomicUsize::new(0);
        let got = oneshot::score_plain(&c, &slices, hyp, threads, &done).expect("clean input");
        assert_eq!(got.stats, want, "{threads} threads under {c:?}");
        assert_eq!(got.digest, set.digest(), "digest");
        assert_eq!((got.segments, got.references), (set.len(), set.reference_count()));
        assert_eq!(done.into_inner(), set.len());
    }
}

proptest! {
    #![proptest_config(ProptestConfig { cases: 96, ..ProptestConfig::default() })]

    /// Per segment, for every tokenizer, caseless on or off, any metric set and parameters.
    #[test]
    fn oneshot_segments_equal_the_compiled_engine(segs in corpus_strategy(6), cfg in any_config(any_tokenizer()), mask in 0u8..8) {
        assert_segments_equal(&segs, only(cfg, mask));
    }

    /// The same on awkward text (controls, every white space, combining marks, CJK, ...).
    #[test]
    fn oneshot_segments_equal_the_compiled_engine_on_awkward_text(
        refs in proptest::collection::vec(proptest::collection::vec(awkward_string(30), 1..=3), 1..=3),
        hyps in proptest::collection::vec(awkward_string(30), 3),
        cfg in any_config(any_tokenizer()),
        mask in 0u8..8,
    ) {
        let segs: Vec<Seg> = refs.into_iter().zip(hyps).map(|(refs, hyp)| Seg { refs, hyp }).collect();
        assert_segments_equal(&segs, only(cfg, mask));
    }

    /// Whole files: corpus statistics, digest and counts, with or without a BOM and CRLF.
    #[test]
    fn oneshot_files_equal_the_compiled_engine(segs in corpus_strategy(8), cfg in any_config(any_tokenizer()), mask in 0u8..8,
                                              streams in 1usize..=3, crlf in any::<bool>(), bom in any::<bool>()) {
        let (refs, hyp) = plain_files(&segs, streams, if crlf { "\r\n" } else { "\n" }, bom);
        assert_plain_equal(&refs, &hyp, only(cfg, mask));
    }
}

/// Many chunks (several threads take turns) and the last line without its newline.
#[test]
fn oneshot_files_over_many_chunks() {
    let words = ["vop", "kel", "zin", "tarr", "Mulde", "ferry", "deck", "gate", "zinnober-kai"];
    let segs: Vec<Seg> = (0..2 * ONESHOT_CHUNK + 77)
        .map(|i| {
            let w = |k: usize| words[(i * 7 + k * 3 + k * k) % words.len()];
            let r: Vec<&str> = (0..3 + i % 9).map(w).collect();
            let h: Vec<&str> = (1..2 + i % 11).map(w).collect();
            Seg { refs: vec![r.join(" "), r[1..].join(" ")], hyp: h.join(" ") }
        })
        .collect();
    let (refs, mut hyp) = plain_files(&segs, 2, "\n", false);
    assert_eq!(hyp.pop(), Some(b'\n'));
    for mask in 1..8 {
        assert_plain_equal(&refs, &hyp, only(Flat { tokenizer: Tokenizer::Whitespace, ..Default::default() }, mask));
    }
    assert_plain_equal(&refs, &hyp, only(Flat { tokenizer: Tokenizer::Nist, lowercase: true, bleu_order: 8, ..Default::default() }, 7));
}

/// Segments with more distinct tokens than a `u64` key (and then a `u128` key) packs: the wider
/// key and the per-segment gram table give the compiled engine's statistics.
#[test]
fn oneshot_wide_segments_take_the_wider_paths() {
    let many = |n: usize, step: usize| (0..n).map(|i| format!("w{}", i * step % n)).collect::<Vec<_>>().join(" ");
    let segs = vec![
        Seg { refs: vec![many(300, 7), many(200, 3)], hyp: many(300, 11) },
        Seg { refs: vec![many(40_000, 1)], hyp: many(40_000, 3) },
        Seg { refs: vec!["vop kel".into()], hyp: "vop kel zin".into() },
    ];
    for order in [2, 4, 8] {
        assert_segments_equal(&segs, only(Flat { tokenizer: Tokenizer::Whitespace, bleu_order: order, ..Default::default() }, 1));
    }
}

/// Input the long way refuses (and words the error for) is refused here too: `None`.
#[test]
fn oneshot_refuses_what_the_parsers_refuse() {
    let c = only(Flat { tokenizer: Tokenizer::Whitespace, ..Default::default() }, 7);
    let score = |refs: &[&[u8]], hyp: &[u8]| oneshot::score_plain(&c, refs, hyp, 2, &AtomicUsize::new(0));
    assert!(score(&[b"vop kel\nzin\n"], b"vop\n").is_none(), "fewer hypothesis lines");
    assert!(score(&[b"vop kel\n"], b"vop\nkel\n").is_none(), "more hypothesis lines");
    assert!(score(&[b"vop\nkel\n", b"zin\n"], b"vop\nkel\n").is_none(), "reference streams differ");
    assert!(score(&[b"vop\n"], b"v\xFFp\n").is_none(), "invalid UTF-8");
    assert!(score(&[], b"vop\n").is_none(), "no reference stream");
    let ok = score(&[b"vop kel\n\n"], b"vop\n\n").expect("clean input");
    assert_eq!((ok.segments, ok.stats.segments), (2, 2));
    assert_eq!(score(&[b""], b"").expect("empty files").segments, 0);
}

/// Segments where a few tokens repeat many times: the run counting of the one-shot path while
/// the pairs of equal tokens stay few, the per-segment gram table past
/// `oneshot::PAIRS_PER_TOKEN` of them; both give the compiled engine's statistics.
#[test]
fn oneshot_repetitive_segments_equal_the_compiled_engine() {
    let rep = |w: &str, n: usize| vec![w; n].join(" ");
    let many = 4 * oneshot::PAIRS_PER_TOKEN;
    let segs = vec![
        // Over the bound: every token of the hypothesis equals every token of the reference.
        Seg { refs: vec![rep("vop", many)], hyp: rep("vop", many + 3) },
        Seg { refs: vec![rep("vop kel", many), rep("kel", 2 * many)], hyp: rep("kel vop", many) },
        // Under it: a few repeats among distinct tokens.
        Seg { refs: vec!["vop kel vop kel zin vop".into(), "kel vop kel".into()], hyp: "vop kel vop kel vop kel zin".into() },
        Seg { refs: vec!["a b a b a b c".into()], hyp: "a b a b c a b a b".into() },
    ];
    for order in [1, 2, 4, 8] {
        for mask in [1, 7] {
            assert_segments_equal(&segs, only(Flat { tokenizer: Tokenizer::Whitespace, bleu_order: order, ..Default::default() }, mask));
        }
    }
}

/// A reader handing out at most `step` bytes per read (or failing after `fail_after` bytes).
struct Trickle<'a> {
    bytes: &'a [u8],
    step: usize,
    fail_after: Option<usize>,
    given: usize,
}

fn trickle(bytes: &[u8], step: usize, fail_after: Option<usize>) -> Trickle<'_> {
    Trickle { bytes, step, fail_after, given: 0 }
}

impl std::io::Read for Trickle<'_> {
    fn read(&mut self, buf: &mut [u8]) -> std::io::Result<usize> {
        if self.fail_after.is_some_and(|f| self.given >= f) {
            return Err(std::io::Error::other("broken file"));
        }
        let n = self.step.min(buf.len()).min(self.bytes.len());
        buf[..n].copy_from_slice(&self.bytes[..n]);
        self.bytes = &self.bytes[n..];
        self.given += n;
        Ok(n)
    }
}

/// Files read a few bytes at a time (lines, a byte-order mark and `\r\n` split across reads)
/// give what the same files in memory give; a read error is refused.
#[test]
fn oneshot_streams_read_in_small_pieces_equal_whole_files() {
    let words = ["vop", "kel", "zin", "tarr", "Mulde", "größer", "deck"];
    let segs: Vec<Seg> = (0..ONESHOT_CHUNK + 300)
        .map(|i| {
            let w = |k: usize| words[(i * 5 + k * k + k) % words.len()];
            let r: Vec<&str> = (0..i % 13).map(w).collect();
            let h: Vec<&str> = (2..3 + i % 7).map(w).collect();
            Seg { refs: vec![r.join(" "), h[1..].join(" ")], hyp: h.join(" ") }
        })
        .collect();
    let c = only(Flat { tokenizer: Tokenizer::Whitespace, ..Default::default() }, 7);
    for (eol, bom) in [("\n", false), ("\r\n", true)] {
        let (refs, hyp) = plain_files(&segs, 2, eol, bom);
        let slices: Vec<&[u8]> = refs.iter().map(Vec::as_slice).collect();
        let want = oneshot::score_plain(&c, &slices, &hyp, 2, &AtomicUsize::new(0)).expect("clean input");
        assert_eq!(want.segments, segs.len());
        for step in [1, 2, 7, 4093] {
            let got = oneshot::score_readers(&c, refs.iter().map(|r| trickle(r, step, None)).collect(), trickle(&hyp, step, None), 3, &AtomicUsize::new(0));
            assert_eq!(got.as_ref(), Some(&want), "{step} bytes per read, eol {eol:?}, bom {bom}");
        }
        let readers = vec![trickle(&refs[0], 999, None), trickle(&refs[1], 999, Some(5000))];
        let got = oneshot::score_readers(&c, readers, trickle(&hyp, 999, None), 2, &AtomicUsize::new(0));
        assert!(got.is_none(), "a read error is refused");
    }
}
