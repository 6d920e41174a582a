//! A reference set compiled for one scoring configuration: the tables the hot path uses.
//!
//! Built once per (reference set, tokenizer, lowercase, metrics): reference tokens interned to
//! integer ids and, per segment and BLEU order, the clipping table of Papineni et al. 2002 (every
//! n-gram of the segment's references with the largest count it has in any one reference). The
//! table stores an n-gram as a position in the reference token arena, repeated as many times as
//! its maximum count, sorted by n-gram: scoring a hypothesis is one sort of its token positions
//! and a linear merge per order (see [`crate::metric::ngram`]), with no per-token allocation.
//!
//! chrF works from the reference text at scoring time (character n-grams are cheap to rebuild
//! and would cost several times the text's size to keep); chrF++ word ids are kept.

use std::sync::atomic::{AtomicUsize, Ordering};
use std::sync::Arc;


use super::intern::Interner;
use super::RefSet;
use crate::metric::ngram::{clipped_matches, clipped_matches_packed, ngram_count, pack4, sort_positions, PackedScratch, PACKED_ORDER};
use crate::metric::{ChrfStats, CorpusStats, OrderCounts, ScoreConfig, SegmentStats};
use crate::text::{is_space, push_lowercased, TokenBuf};

/// Segments per unit of work when a corpus is scored on several threads.
pub const SCORE_CHUNK: usize = 2048;

/// Token-id sequences of every reference, each followed by `pad` zeros.
#[derive(Default)]
struct Sequences {
    pad: usize,
    seq: Vec<u32>,
    /// Start of each reference in `seq` (over all references of all segments).
    start: Vec<u32>,
    /// Length of each reference.
    len: Vec<u32>,
}

impl Sequences {
    fn push(&mut self, ids: impl Iterator<Item = u32>) {
        let start = self.seq.len();
        self.start.push(start as u32);
        self.seq.extend(ids);
        self.len.push((self.seq.len() - start) as u32);
        self.seq.extend(std::iter::repeat(0).take(self.pad));
    }
    fn range(&self, r: usize) -> std::ops::Range<usize> {
        let s = self.start[r] as usize;
        s..s + self.len[r] as usize
    }
    fn memory_bytes(&self) -> usize {
        (self.seq.capacity() + self.start.capacity() + self.len.capacity()) * 4
    }
}

/// BLEU clipping tables.
struct BleuTable {
    order: usize,
    tokens: Sequences,
    /// Positions into `tokens.seq`, per segment and order, sorted by n-gram, with multiplicity.
    clip: Vec<u32>,
    /// `clip` offsets: entry `seg * order + (n - 1)` starts the table of order n of `seg`.
    clip_start: Vec<u32>,
}

/// A reference set compiled for one configuration.
pub struct Compiled {
    refs: Arc<RefSet>,
    config: ScoreConfig,
    /// First reference index (into the flat per-reference arrays) of each segment, plus one.
    seg_ref: Vec<u32>,
    tokens: Interner,
    bleu: Option<BleuTable>,
    words: Interner,
    word_seqs: Option<Sequences>,
}

/// Reusable per-thread buffers for scoring.
#[derive(Default)]
pub struct Scratch {
    tok: TokenBuf,
    ids: Vec<u32>,
    pos: Vec<u32>,
    keys: Vec<u128>,
    gather: PackedScratch,
    lower: String,
    hyp_chars: Vec<u32>,
    hyp_char_pos: Vec<u32>,
    ref_chars: Vec<u32>,
    ref_char_pos: Vec<u32>,
    hyp_words: Vec<u32>,
    hyp_word_pos: Vec<u32>,
    ref_word_pos: Vec<u32>,
}

impl Compiled {
    /// Compile `refs` for `config` (which must be valid: see [`ScoreConfig::validate`]).
    pub fn build(refs: Arc<RefSet>, config: ScoreConfig) -> Compiled {
        let mut seg_ref = Vec::with_capacity(refs.len() + 1);
        let mut nrefs = 0u32;
        seg_ref.push(0);
        for seg in refs.segments() {
            nrefs += seg.ref_count() as u32;
            seg_ref.push(nrefs);
        }
        let mut c = Compiled { refs, config, seg_ref, tokens: Interner::default(), bleu: None, words: Interner::default(), word_seqs: None };
        if config.metrics.bleu {
            c.bleu = Some(c.build_bleu());
        }
        if config.metrics.chrfpp {
            c.word_seqs = Some(c.build_words());
        }
        c
    }

    fn build_bleu(&mut self) -> BleuTable {
        let order = self.config.bleu_order;
        let mut tokens = Sequences { pad: order.max(PACKED_ORDER), ..Default::default() };
        let mut buf = TokenBuf::default();
        let mut clip = Vec::new();
        let mut clip_start = Vec::with_capacity(self.refs.len() * order + 1);
        let mut cand: Vec<(u32, u32)> = Vec::new();
        let refs = Arc::clone(&self.refs);
        for seg in refs.segments() {
            let first = tokens.start.len();
            for r in seg.refs() {
                self.config.tokenizer.tokenize_into(r, self.config.lowercase, &mut buf);
                let interner = &mut self.tokens;
                tokens.push(buf.token_bytes().map(|t| interner.intern(t)));
            }
            let seg_refs = first..tokens.start.len();
            for n in 1..=order {
                clip_start.push(clip.len() as u32);
                cand.clear();
                for r in seg_refs.clone() {
                    let range = tokens.range(r);
                    let complete = (range.len() + 1).saturating_sub(n);
                    cand.extend((0..complete).map(|p| ((range.start + p) as u32, r as u32)));
                }
                let seq = &tokens.seq;
                let gram = |p: u32| &seq[p as usize..p as usize + n];
                cand.sort_unstable_by(|a, b| gram(a.0).cmp(gram(b.0)).then(a.1.cmp(&b.1)));
                let mut i = 0;
                while i < cand.len() {
                    let g = gram(cand[i].0);
                    let (mut best, mut run, mut run_ref) = (0u32, 0u32, cand[i].1);
                    let mut j = i;
                    while j < cand.len() && gram(cand[j].0) == g {
                        if cand[j].1 != run_ref {
                            run_ref = cand[j].1;
                            run = 0;
                        }
                        run += 1;
                        best = best.max(run);
                        j += 1;
                    }
                    clip.extend(std::iter::repeat(cand[i].0).take(best as usize));
                    i = j;
                }
            }
        }
        clip_start.push(clip.len() as u32);
        clip.shrink_to_fit();
        self.tokens.shrink_to_fit();
        tokens.seq.shrink_to_fit();
        BleuTable { order, tokens, clip, clip_start }
    }

    fn build_words(&mut self) -> Sequences {
        let mut seqs = Sequences { pad: self.config.chrf_word_order, ..Default::default() };
        let mut lower = String::new();
        let refs = Arc::clone(&self.refs);
        for seg in refs.segments() {
            for r in seg.refs() {
                lower.clear();
                push_lowercased(r, self.config.lowercase, &mut lower);
                let words = &mut self.words;
                seqs.push(lower.split(is_space).filter(|w| !w.is_empty()).map(|w| words.intern(w.as_bytes())));
            }
        }
        seqs.seq.shrink_to_fit();
        self.words.shrink_to_fit();
        seqs
    }

    /// The reference set this was compiled from.
    pub fn refs(&self) -> &Arc<RefSet> {
        &self.refs
    }

    /// The configuration this was compiled for.
    pub fn config(&self) -> &ScoreConfig {
        &self.config
    }

    /// Heap bytes of the compiled tables (not counting the reference set itself).
    pub fn memory_bytes(&self) -> usize {
        let bleu = self.bleu.as_ref().map_or(0, |b| b.tokens.memory_bytes() + (b.clip.capacity() + b.clip_start.capacity()) * 4);
        bleu + self.tokens.memory_bytes()
            + self.words.memory_bytes()
            + self.word_seqs.as_ref().map_or(0, Sequences::memory_bytes)
            + self.seg_ref.capacity() * 4
    }

    /// Score hypothesis `hyp` against segment `seg` (0-based index; must be in range).
    pub fn score_segment(&self, seg: usize, hyp: &str, s: &mut Scratch) -> SegmentStats {
        let mut out = SegmentStats::default();
        self.score_segment_into(seg, hyp, s, &mut out);
        out
    }

    /// [`Compiled::score_segment`] into `out`, overwriting it: what the hot loops use, so that
    /// the (large) statistics record is not copied per segment.
    pub fn score_segment_into(&self, seg: usize, hyp: &str, s: &mut Scratch, out: &mut SegmentStats) {
        let refs = self.seg_ref[seg] as usize..self.seg_ref[seg + 1] as usize;
        match &self.bleu {
            Some(b) => self.score_bleu(b, seg, refs.clone(), hyp, s, out),
            None => out.bleu = Default::default(),
        }
        if self.config.metrics.any_chrf() {
            self.score_chrf(seg, refs, hyp, s, out);
        } else {
            (out.chrf, out.chrf_ref, out.chrfpp, out.chrfpp_ref) = Default::default();
        }
    }

    fn score_bleu(&self, b: &BleuTable, seg: usize, refs: std::ops::Range<usize>, hyp: &str, s: &mut Scratch, out: &mut SegmentStats) {
        let order = b.order;
        self.config.tokenizer.tokenize_into(hyp, self.config.lowercase, &mut s.tok);
        s.ids.clear();
        s.ids.extend(s.tok.token_bytes().map(|t| self.tokens.get(t)));
        let len = s.ids.len();
        s.ids.extend(std::iter::repeat(0).take(order.max(PACKED_ORDER)));
        let st = &mut out.bleu;
        *st = Default::default();
        let table = |n: usize| {
            let k = seg * order + n - 1;
            &b.clip[b.clip_start[k] as usize..b.clip_start[k + 1] as usize]
        };
        if order <= PACKED_ORDER {
            // Common case: every n-gram fits one integer key; one sort serves all orders.
            s.keys.clear();
            s.keys.extend((0..len).map(|p| pack4(&s.ids, p)));
            s.keys.sort_unstable();
            let tables: [&[u32]; PACKED_ORDER] = std::array::from_fn(|k| if k < order { table(k + 1) } else { &[] });
            clipped_matches_packed(&s.keys, &b.tokens.seq, &tables[..order], &mut s.gather, &mut st.matches);
            for n in 1..=order {
                st.totals[n - 1] = ngram_count(len, n);
            }
        } else {
            sort_positions(&s.ids, len, order, &mut s.pos);
            for n in 1..=order {
                st.totals[n - 1] = ngram_count(len, n);
                st.matches[n - 1] = clipped_matches(n, &s.ids, &s.pos, &b.tokens.seq, table(n));
            }
        }
        st.hyp_len = len as u64;
        st.ref_len = self.config.ref_length.pick(len as u64, refs.map(|r| b.tokens.len[r] as u64));
    }

    fn score_chrf(&self, seg: usize, refs: std::ops::Range<usize>, hyp: &str, s: &mut Scratch, out: &mut SegmentStats) {
        let cfg = &self.config;
        let (c_order, w_order) = (cfg.chrf_char_order, cfg.chrf_word_order);
        s.lower.clear();
        push_lowercased(hyp, cfg.lowercase, &mut s.lower);
        char_codes(&s.lower, c_order, &mut s.hyp_chars);
        let hyp_len = s.hyp_chars.len() - c_order;
        sort_positions(&s.hyp_chars, hyp_len, c_order, &mut s.hyp_char_pos);
        let mut hyp_words = 0;
        if self.word_seqs.is_some() {
            s.hyp_words.clear();
            s.hyp_words.extend(s.lower.split(is_space).filter(|w| !w.is_empty()).map(|w| self.words.get(w.as_bytes())));
            hyp_words = s.hyp_words.len();
            s.hyp_words.extend(std::iter::repeat(0).take(w_order));
            sort_positions(&s.hyp_words, hyp_words, w_order, &mut s.hyp_word_pos);
        }
        let segment = self.refs.segment(seg);
        (out.chrf, out.chrf_ref, out.chrfpp, out.chrfpp_ref) = Default::default();
        let (mut best_c, mut best_pp) = (f64::NEG_INFINITY, f64::NEG_INFINITY);
        for (k, r) in refs.enumerate() {
            s.lower.clear();
            push_lowercased(segment.reference(k), cfg.lowercase, &mut s.lower);
            char_codes(&s.lower, c_order, &mut s.ref_chars);
            let ref_len = s.ref_chars.len() - c_order;
            sort_positions(&s.ref_chars, ref_len, c_order, &mut s.ref_char_pos);
            let mut st = ChrfStats::default();
            count_orders(c_order, (&s.hyp_chars, &s.hyp_char_pos, hyp_len), (&s.ref_chars, &s.ref_char_pos, ref_len), &mut st.char);
            if cfg.metrics.chrf {
                let f = st.score(c_order, 0, cfg.beta).score;
                if f > best_c {
                    best_c = f;
                    out.chrf = st;
                    out.chrf_ref = k as u32;
                }
            }
            if let Some(ws) = &self.word_seqs {
                let range = ws.range(r);
                let wseq = &ws.seq[range.start..range.end + ws.pad];
                sort_positions(wseq, range.len(), w_order, &mut s.ref_word_pos);
                count_orders(w_order, (&s.hyp_words, &s.hyp_word_pos, hyp_words), (wseq, &s.ref_word_pos, range.len()), &mut st.word);
                let f = st.score(c_order, w_order, cfg.beta).score;
                if f > best_pp {
                    best_pp = f;
                    out.chrfpp = st;
                    out.chrfpp_ref = k as u32;
                }
            }
        }
    }

    /// Corpus statistics of hypotheses aligned with the segments (`hyps[i]` against segment `i`),
    /// without keeping per-segment results; same sums as adding up [`Compiled::score_aligned`].
    pub fn score_corpus(&self, hyps: &[&str], threads: usize, done: &AtomicUsize) -> CorpusStats {
        assert!(hyps.len() <= self.refs.len(), "more hypotheses than segments");
        let chunks = hyps.len().div_ceil(SCORE_CHUNK);
        let next = AtomicUsize::new(0);
        let work = || {
            let mut scratch = Scratch::default();
            let mut sum = CorpusStats::default();
            let mut one = SegmentStats::default();
            loop {
                let c = next.fetch_add(1, Ordering::Relaxed);
                if c >= chunks {
                    break;
                }
                let base = c * SCORE_CHUNK;
                let chunk = &hyps[base..(base + SCORE_CHUNK).min(hyps.len())];
                for (i, h) in chunk.iter().enumerate() {
                    self.score_segment_into(base + i, h, &mut scratch, &mut one);
                    sum.add_segment(&one);
                }
                done.fetch_add(chunk.len(), Ordering::Relaxed);
            }
            sum
        };
        let threads = threads.clamp(1, chunks.max(1));
        if threads == 1 {
            return work();
        }
        std::thread::scope(|sc| {
            let handles: Vec<_> = (0..threads).map(|_| sc.spawn(work)).collect();
            handles.into_iter().map(|h| h.join().expect("scoring thread panicked")).sum()
        })
    }

    /// Score hypotheses aligned with the segments (`hyps[i]` against segment `i`) on `threads`
    /// threads; `done` counts scored segments as they finish (for progress display). The result
    /// is in segment order and does not depend on the number of threads.
    pub fn score_aligned(&self, hyps: &[&str], threads: usize, done: &AtomicUsize) -> Vec<SegmentStats> {
        assert!(hyps.len() <= self.refs.len(), "more hypotheses than segments");
        let chunks: Vec<&[&str]> = hyps.chunks(SCORE_CHUNK).collect();
        let next = AtomicUsize::new(0);
        let mut results: Vec<Vec<SegmentStats>> = vec![Vec::new(); chunks.len()];
        let work = || {
            let mut scratch = Scratch::default();
            let mut mine = Vec::new();
            loop {
                let c = next.fetch_add(1, Ordering::Relaxed);
                let Some(chunk) = chunks.get(c) else { break };
                let base = c * SCORE_CHUNK;
                let stats: Vec<SegmentStats> = chunk.iter().enumerate().map(|(i, h)| self.score_segment(base + i, h, &mut scratch)).collect();
                done.fetch_add(chunk.len(), Ordering::Relaxed);
                mine.push((c, stats));
            }
            mine
        };
        let threads = threads.clamp(1, chunks.len().max(1));
        let parts: Vec<Vec<(usize, Vec<SegmentStats>)>> = if threads == 1 {
            vec![work()]
        } else {
            std::thread::scope(|sc| {
                let handles: Vec<_> = (0..threads).map(|_| sc.spawn(work)).collect();
                handles.into_iter().map(|h| h.join().expect("scoring thread panicked")).collect()
            })
        };
        for (c, stats) in parts.into_iter().flatten() {
            results[c] = stats;
        }
        results.into_iter().flatten().collect()
    }
}

/// Character codes (code point + 1, so 0 is free for padding) of the non-space characters of
/// `text`, followed by `pad` zeros.
fn char_codes(text: &str, pad: usize, out: &mut Vec<u32>) {
    out.clear();
    out.extend(text.chars().filter(|&c| !is_space(c)).map(|c| c as u32 + 1));
    out.extend(std::iter::repeat(0).take(pad));
}

/// Fill matches / hyp / reference counts of orders 1..=order.
fn count_orders(order: usize, hyp: (&[u32], &[u32], usize), reference: (&[u32], &[u32], usize), out: &mut OrderCounts) {
    for n in 1..=order {
        out.matches[n - 1] = clipped_matches(n, hyp.0, hyp.1, reference.0, reference.1);
        out.hyp[n - 1] = ngram_count(hyp.2, n);
        out.reference[n - 1] = ngram_count(reference.2, n);
    }
}

impl std::fmt::Debug for Compiled {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("Compiled").field("refs", &self.refs).field("config", &self.config).finish()
    }
}
