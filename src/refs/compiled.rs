//! A reference set compiled for one scoring configuration: the tables the hot path uses.
//!
//! Built once per (reference set, tokenizer, caseless, metrics). BLEU: per segment, a gram
//! table (see [`crate::metric::ngram::GramBuilder`]) of its references' tokens, holding every
//! n-gram with the largest count it has in any one reference (the clipping of Papineni et al.
//! 2002), in entries of one byte for segments of fewer than 255 tokens. Tokens are known by a
//! key of their bytes (up to 7 bytes; longer tokens through a small interner), so scoring a
//! hypothesis touches its own segment's table only: it is split in place (for `whitespace`
//! without lowercasing, no copy), each token named through the table's hash slots (a token the
//! references lack can start no match) and its n-grams matched by walking the table.
//!
//! chrF works from the reference text at scoring time, with the characters' n-grams packed into
//! integer keys; kept per reference is only the order those keys sort in (one byte per
//! character for references of up to 256 characters), so the reference side needs no sort.
//! chrF++ word ids are kept.

use std::sync::atomic::{AtomicUsize, Ordering};
use std::sync::Arc;


use super::intern::Interner;
use super::RefSet;
use crate::metric::ngram::{
    clipped_matches, key_order, keys_in_order, ngram_count, packed_fits, packed_matches, packed_ref_pad, sort_positions, sorted_keys, Gram, GramBuilder,
    GramHead, GramScratch, Packed, Width,
};
use crate::metric::{ChrfStats, CorpusStats, OrderCounts, ScoreConfig, SegmentStats};
use crate::text::{for_each_space_token, is_space, ASCII_SPACE, push_lowercased, TokenBuf, Tokenizer};

/// Segments per unit of work when a corpus is scored on several threads.
pub const SCORE_CHUNK: usize = 2048;

/// Token-id sequences of every reference, each followed by `pad` zeros.
#[derive(Default)]
pub(super) struct Sequences {
    pad: usize,
    seq: Vec<u32>,
    /// Start of each reference in `seq` (over all references of all segments).
    start: Vec<u32>,
    /// Length of each reference.
    len: Vec<u32>,
}

impl Sequences {
    /// No sequences, padded with `pad` zeros (keeping the buffers).
    pub(super) fn reset(&mut self, pad: usize) {
        self.pad = pad;
        self.seq.clear();
        self.start.clear();
        self.len.clear();
    }
    pub(super) fn push(&mut self, ids: impl Iterator<Item = u32>) {
        let start = self.seq.len();
        self.start.push(start as u32);
        self.seq.extend(ids);
        self.len.push((self.seq.len() - start) as u32);
        self.seq.extend(std::iter::repeat_n(0, self.pad));
    }
    fn range(&self, r: usize) -> std::ops::Range<usize> {
        let s = self.start[r] as usize;
        s..s + self.len[r] as usize
    }
    fn memory_bytes(&self) -> usize {
        (self.seq.capacity() + self.start.capacity() + self.len.capacity()) * 4
    }
}

/// Key of a token of 8 bytes or more: this marker and the token's id in the long-token interner.
const LONG_KEY: u64 = 0xFF << 56;

/// The key a gram table knows a token by: up to 7 bytes, the bytes themselves and the length
/// (top byte, at most 7); longer tokens, [`LONG_KEY`] and their id from `long`, interned when
/// `add` is set (else [`super::intern::UNKNOWN`], which no table holds). `text[a..e]` is the token.
#[inline(always)]
pub(super) fn token_key(text: &[u8], a: usize, e: usize, long: &mut LongTokens<'_>) -> u64 {
    let len = e - a;
    if len <= 7 {
        let w = match text.get(a..a + 8) {
            Some(w) => u64::from_le_bytes(w.try_into().unwrap_or([0; 8])),
            None => {
                let mut buf = [0u8; 8];
                buf[..len].copy_from_slice(&text[a..e]);
                u64::from_le_bytes(buf)
            }
        };
        (w & ((1u64 << (8 * len)) - 1)) | (len as u64) << 56
    } else {
        LONG_KEY
            | match long {
                LongTokens::Add(i) => i.intern(&text[a..e]),
                LongTokens::Get(i) => i.get(&text[a..e]),
            } as u64
    }
}

pub(super) enum LongTokens<'a> {
    Add(&'a mut Interner),
    Get(&'a Interner),
}

/// Entry width of one segment's table.
#[derive(Debug, Clone, Copy)]
enum Wide {
    U8,
    U16,
    U32,
}

/// Gram tables of many sequences, each in the narrowest entry width that holds it.
#[derive(Default)]
struct GramTables {
    heads: Vec<(GramHead, Wide)>,
    d8: Vec<u8>,
    d16: Vec<u16>,
    d32: Vec<u32>,
    keys: Vec<u64>,
}

impl GramTables {
    fn push(&mut self, b: &mut GramBuilder, seqs: &[&[u64]], order: usize) {
        let p = GramBuilder::positions(seqs.iter().copied());
        let head = if p < u8::MAX as usize {
            (b.build(seqs, order, &mut self.d8, &mut self.keys), Wide::U8)
        } else if p < u16::MAX as usize {
            (b.build(seqs, order, &mut self.d16, &mut self.keys), Wide::U16)
        } else {
            (b.build(seqs, order, &mut self.d32, &mut self.keys), Wide::U32)
        };
        self.heads.push(head);
    }
    fn clear(&mut self) {
        self.heads.clear();
        self.d8.clear();
        self.d16.clear();
        self.d32.clear();
        self.keys.clear();
    }
    fn shrink_to_fit(&mut self) {
        self.heads.shrink_to_fit();
        self.d8.shrink_to_fit();
        self.d16.shrink_to_fit();
        self.d32.shrink_to_fit();
        self.keys.shrink_to_fit();
    }
    fn memory_bytes(&self) -> usize {
        self.heads.capacity() * std::mem::size_of::<(GramHead, Wide)>()
            + self.d8.capacity()
            + self.d16.capacity() * 2
            + self.d32.capacity() * 4
            + self.keys.capacity() * 8
    }
}

/// BLEU tables: per segment, a gram table of its references' tokens (counts are the largest in
/// any one reference: the clipping counts).
pub(super) struct BleuTable {
    order: usize,
    ref_length: crate::metric::RefLength,
    tables: GramTables,
    /// Tokens of 8 bytes or more.
    long: Interner,
    /// Token count of each reference (over all references of all segments).
    ref_len: Vec<u32>,
}

/// Reusable buffers of building BLEU tables.
#[derive(Default)]
pub(super) struct BleuBuild {
    buf: TokenBuf,
    builder: GramBuilder,
    keys: Vec<Vec<u64>>,
}

impl BleuTable {
    pub(super) fn new(order: usize, ref_length: crate::metric::RefLength) -> BleuTable {
        BleuTable { order, ref_length, tables: GramTables::default(), long: Interner::default(), ref_len: Vec::new() }
    }

    /// Forget every table (keeping the buffers), to build tables for `order` and `ref_length`.
    pub(super) fn reset(&mut self, order: usize, ref_length: crate::metric::RefLength) {
        (self.order, self.ref_length) = (order, ref_length);
        self.tables.clear();
        self.long.clear();
        self.ref_len.clear();
    }

    /// Add the table of one more segment, of references `refs`.
    pub(super) fn push_segment<'r>(&mut self, cfg: &ScoreConfig, refs: impl ExactSizeIterator<Item = &'r str>, b: &mut BleuBuild) {
        let count = refs.len();
        b.keys.resize_with(count.max(b.keys.len()), Vec::new);
        for (k, r) in refs.enumerate() {
            cfg.tokenizer.tokenize_into(r, cfg.caseless, &mut b.buf);
            let text = b.buf.text_bytes();
            let long = &mut LongTokens::Add(&mut self.long);
            b.keys[k].clear();
            b.keys[k].extend(b.buf.spans().iter().map(|&(a, e)| token_key(text, a as usize, e as usize, long)));
            self.ref_len.push(b.keys[k].len() as u32);
        }
        let seqs: Vec<&[u64]> = b.keys[..count].iter().map(Vec::as_slice).collect();
        self.tables.push(&mut b.builder, &seqs, self.order);
    }
}

/// A reference set compiled for one configuration.
pub struct Compiled {
    refs: Arc<RefSet>,
    config: ScoreConfig,
    /// First reference index (into the flat per-reference arrays) of each segment, plus one.
    seg_ref: Vec<u32>,
    bleu: Option<BleuTable>,
    words: Interner,
    word_seqs: Option<Sequences>,
    char_orders: Option<CharOrders>,
}

/// Per reference, the order its character n-gram keys sort in (so that scoring puts them in
/// order instead of sorting them): positions of one byte for references of up to 256
/// characters, two bytes up to 65536; longer references are sorted when scored.
#[derive(Default)]
pub(super) struct CharOrders {
    /// Per reference: start in `by8` / `by16` shifted left by 2, or'ed with 1 (`by8`), 2
    /// (`by16`) or 0 (none).
    at: Vec<u64>,
    by8: Vec<u8>,
    by16: Vec<u16>,
}

/// The known key order of one reference.
#[derive(Clone, Copy)]
enum RefOrder<'a> {
    Unknown,
    U8(&'a [u8]),
    U16(&'a [u16]),
}

impl CharOrders {
    fn get(&self, r: usize, len: usize) -> RefOrder<'_> {
        let (start, kind) = ((self.at[r] >> 2) as usize, self.at[r] & 3);
        match kind {
            1 => RefOrder::U8(&self.by8[start..start + len]),
            2 => RefOrder::U16(&self.by16[start..start + len]),
            _ => RefOrder::Unknown,
        }
    }
    fn memory_bytes(&self) -> usize {
        self.at.capacity() * 8 + self.by8.capacity() + self.by16.capacity() * 2
    }
}

/// Reusable per-thread buffers for scoring.
#[derive(Default)]
pub struct Scratch {
    tok: TokenBuf,
    keys: Vec<u64>,
    names: Vec<u32>,
    gram: GramScratch,
    lower: String,
    hyp_chars: Vec<u32>,
    hyp_char_pos: Vec<u32>,
    ref_chars: Vec<u32>,
    ref_char_pos: Vec<u32>,
    hyp_words: Vec<u32>,
    hyp_word_pos: Vec<u32>,
    ref_word_pos: Vec<u32>,
    packed: PackedScratch,
}

/// Buffers of the packed-key chrF path.
#[derive(Default)]
struct PackedScratch {
    ref_items: Vec<u32>,
    hyp_chars: HypKeys,
    hyp_words: HypKeys,
    bufs: KeyBufs,
}

/// Reference keys and merged lists.
#[derive(Default)]
struct KeyBufs {
    ref64: Vec<u64>,
    ref128: Vec<u128>,
    merged64: Vec<u64>,
    merged128: Vec<u128>,
    tmp64: Vec<u64>,
    tmp128: Vec<u128>,
}

/// Sorted packed keys of the hypothesis, made once per segment for each key type asked for.
#[derive(Default)]
struct HypKeys {
    k64: Vec<u64>,
    k128: Vec<u128>,
    have64: bool,
    have128: bool,
}

impl HypKeys {
    fn reset(&mut self) {
        (self.have64, self.have128) = (false, false);
    }
}

/// Key types with a place for the hypothesis keys of that type in [`HypKeys`] and scratch
/// buffers in [`KeyBufs`].
trait PackedBufs: Packed {
    fn hyp(h: &mut HypKeys) -> (&mut Vec<Self>, &mut bool);
    fn bufs(p: &mut KeyBufs) -> (&mut Vec<Self>, &mut Vec<Self>, &mut Vec<Self>);
}

impl PackedBufs for u64 {
    fn hyp(h: &mut HypKeys) -> (&mut Vec<Self>, &mut bool) {
        (&mut h.k64, &mut h.have64)
    }
    fn bufs(p: &mut KeyBufs) -> (&mut Vec<Self>, &mut Vec<Self>, &mut Vec<Self>) {
        (&mut p.ref64, &mut p.merged64, &mut p.tmp64)
    }
}

impl PackedBufs for u128 {
    fn hyp(h: &mut HypKeys) -> (&mut Vec<Self>, &mut bool) {
        (&mut h.k128, &mut h.have128)
    }
    fn bufs(p: &mut KeyBufs) -> (&mut Vec<Self>, &mut Vec<Self>, &mut Vec<Self>) {
        (&mut p.ref128, &mut p.merged128, &mut p.tmp128)
    }
}

/// Matches of orders 1..=`order` between hypothesis items `hyp` (keys cached in `hk`) and
/// reference items `reference`, with keys of type `K`; writes `out[..order]`.
fn packed_orders<K: PackedBufs>(
    order: usize,
    hyp: &[u32],
    hk: &mut HypKeys,
    reference: &[u32],
    by: RefOrder<'_>,
    p: &mut KeyBufs,
    out: &mut [u64],
) {
    let (hk, have) = K::hyp(hk);
    if !*have {
        sorted_keys(hyp, order, 0, hk);
        *have = true;
    }
    let (rk, merged, tmp) = K::bufs(p);
    match by {
        RefOrder::Unknown => sorted_keys(reference, order, packed_ref_pad::<K>(order), rk),
        RefOrder::U8(by) => keys_in_order(reference, order, by, tmp, rk),
        RefOrder::U16(by) => keys_in_order(reference, order, by, tmp, rk),
    }
    packed_matches(hk, rk, order, merged, out);
}

/// Matches of orders 1..=`order` by packed keys in the narrowest type that holds items up to
/// `max`; false (and nothing written) when none does.
#[allow(clippy::too_many_arguments)]
fn packed_counts(
    order: usize,
    max: u32,
    hyp: &[u32],
    hk: &mut HypKeys,
    reference: &[u32],
    by: RefOrder<'_>,
    p: &mut KeyBufs,
    out: &mut [u64],
) -> bool {
    if packed_fits::<u64>(order, max) {
        packed_orders::<u64>(order, hyp, hk, reference, by, p, out);
    } else if packed_fits::<u128>(order, max) {
        packed_orders::<u128>(order, hyp, hk, reference, by, p, out);
    } else {
        return false;
    }
    true
}

/// Character codes + 1 of the non-space characters of `text` (lowercased when asked, in
/// `lower`) into `out`; returns the largest.
fn char_items(text: &str, lowercase: bool, lower: &mut String, out: &mut Vec<u32>) -> u32 {
    let text = if lowercase {
        lower.clear();
        push_lowercased(text, true, lower);
        lower.as_str()
    } else {
        text
    };
    out.clear();
    let mut max = 0;
    if text.is_ascii() {
        // Every byte written, the write position advanced past non-space ones: no branch.
        let bytes = text.as_bytes();
        out.resize(bytes.len(), 0);
        let mut k = 0;
        for &b in bytes {
            out[k] = b as u32 + 1;
            k += !ASCII_SPACE[b as usize] as usize;
            max = max.max(b as u32 + 1);
        }
        out.truncate(k);
        return max;
    }
    for c in text.chars() {
        if !is_space(c) {
            let v = c as u32 + 1;
            max = max.max(v);
            out.push(v);
        }
    }
    max
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
        let mut c = Compiled { refs, config, seg_ref, bleu: None, char_orders: None, words: Interner::default(), word_seqs: None };
        if let Some(b) = config.metrics.bleu {
            c.bleu = Some(c.build_bleu(b.order, b.ref_length));
        }
        if config.max_words() > 0 {
            c.word_seqs = Some(c.build_words());
        }
        if config.any_chrf() {
            c.char_orders = Some(c.build_char_orders());
        }
        c
    }

    fn build_bleu(&mut self, order: usize, ref_length: crate::metric::RefLength) -> BleuTable {
        let mut t = BleuTable::new(order, ref_length);
        let mut b = BleuBuild::default();
        for seg in self.refs.segments() {
            t.push_segment(&self.config, seg.refs(), &mut b);
        }
        t.tables.shrink_to_fit();
        t.long.shrink_to_fit();
        t.ref_len.shrink_to_fit();
        t
    }

    fn build_char_orders(&self) -> CharOrders {
        let mut o = CharOrders::default();
        let (mut lower, mut items) = (String::new(), Vec::new());
        for seg in self.refs.segments() {
            for r in seg.refs() {
                char_items(r, self.config.caseless, &mut lower, &mut items);
                let by = if items.len() <= 1 << 16 { key_order(&items, self.config.max_chars()) } else { None };
                o.at.push(match by {
                    Some(by) if items.len() <= 1 << 8 => {
                        let at = (o.by8.len() as u64) << 2 | 1;
                        o.by8.extend(by.iter().map(|&p| p as u8));
                        at
                    }
                    Some(by) => {
                        let at = (o.by16.len() as u64) << 2 | 2;
                        o.by16.extend(by.iter().map(|&p| p as u16));
                        at
                    }
                    None => 0,
                });
            }
        }
        o.at.shrink_to_fit();
        o.by8.shrink_to_fit();
        o.by16.shrink_to_fit();
        o
    }

    fn build_words(&mut self) -> Sequences {
        let mut seqs = Sequences { pad: self.config.max_words(), ..Default::default() };
        let mut lower = String::new();
        let refs = Arc::clone(&self.refs);
        for seg in refs.segments() {
            for r in seg.refs() {
                lower.clear();
                push_lowercased(r, self.config.caseless, &mut lower);
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
        let bleu = self.bleu.as_ref().map_or(0, |b| b.tables.memory_bytes() + b.long.memory_bytes() + b.ref_len.capacity() * 4);
        bleu + self.words.memory_bytes()
            + self.word_seqs.as_ref().map_or(0, Sequences::memory_bytes)
            + self.char_orders.as_ref().map_or(0, CharOrders::memory_bytes)
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
        self.score_configured(seg, hyp, s, out);
        if self.bleu.is_none() {
            out.bleu = Default::default();
        }
        if !self.config.any_chrf() {
            (out.chrf, out.chrf_ref, out.chrfpp, out.chrfpp_ref) = Default::default();
        }
    }

    /// [`Compiled::score_segment_into`] for the configured metrics only: the other parts of
    /// `out` are left as they are.
    #[inline]
    fn score_configured(&self, seg: usize, hyp: &str, s: &mut Scratch, out: &mut SegmentStats) {
        let refs = self.seg_ref[seg] as usize..self.seg_ref[seg + 1] as usize;
        if let Some(b) = &self.bleu {
            bleu_segment(&self.config, b, seg, refs.clone(), hyp, s, out);
        }
        if self.config.any_chrf() {
            let segment = self.refs.segment(seg);
            let tables = ChrfTables { words: &self.words, word_seqs: self.word_seqs.as_ref(), char_orders: self.char_orders.as_ref() };
            chrf_segment(&self.config, &tables, refs, |k| segment.reference(k), hyp, s, out);
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
                // Parts of `one` for metrics not configured stay zero: adding them is skipped.
                let (bleu, chrf) = (self.bleu.is_some(), self.config.any_chrf());
                for (i, h) in chunk.iter().enumerate() {
                    self.score_configured(base + i, h, &mut scratch, &mut one);
                    sum.add_scored_parts(&one, bleu, chrf);
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

/// The per-reference tables chrF scoring uses (word ids and sequences for chrF++, known key
/// orders of the references' characters), indexed by reference.
pub(super) struct ChrfTables<'a> {
    pub(super) words: &'a Interner,
    pub(super) word_seqs: Option<&'a Sequences>,
    pub(super) char_orders: Option<&'a CharOrders>,
}

pub(super) fn bleu_segment(cfg: &ScoreConfig, b: &BleuTable, seg: usize, refs: std::ops::Range<usize>, hyp: &str, s: &mut Scratch, out: &mut SegmentStats) {
    let (head, wide) = &b.tables.heads[seg];
    let st = &mut out.bleu;
    *st = Default::default();
    match wide {
        Wide::U8 => bleu_matches(cfg, b, Gram::new(head, b.order, &b.tables.d8, &b.tables.keys), hyp, s, &mut st.matches),
        Wide::U16 => bleu_matches(cfg, b, Gram::new(head, b.order, &b.tables.d16, &b.tables.keys), hyp, s, &mut st.matches),
        Wide::U32 => bleu_matches(cfg, b, Gram::new(head, b.order, &b.tables.d32, &b.tables.keys), hyp, s, &mut st.matches),
    }
    let len = s.names.len();
    for n in 1..=b.order {
        st.totals[n - 1] = ngram_count(len, n);
    }
    st.hyp_len = len as u64;
    st.ref_len = b.ref_length.pick(len as u64, refs.map(|r| b.ref_len[r] as u64));
}

/// Tokenize `hyp`, name its tokens in `g` (into `s.names`) and count clipped matches.
#[inline]
fn bleu_matches<W: Width>(cfg: &ScoreConfig, b: &BleuTable, g: Gram<'_, W>, hyp: &str, s: &mut Scratch, matches: &mut [u64]) {
    // Keys first, then names: two tight loops overlap their loads better than one.
    s.keys.clear();
    let mut long = LongTokens::Get(&b.long);
    if cfg.tokenizer == Tokenizer::Whitespace && !cfg.caseless {
        let (text, keys) = (hyp.as_bytes(), &mut s.keys);
        for_each_space_token(hyp, |a, e| keys.push(token_key(text, a, e, &mut long)));
    } else {
        cfg.tokenizer.tokenize_into(hyp, cfg.caseless, &mut s.tok);
        let text = s.tok.text_bytes();
        s.keys.extend(s.tok.spans().iter().map(|&(a, e)| token_key(text, a as usize, e as usize, &mut long)));
    }
    s.names.clear();
    s.names.extend(s.keys.iter().map(|&k| g.lookup(k)));
    g.count(&s.names, &mut s.gram, &mut matches[..b.order]);
}

/// chrF / chrF++ of `hyp` against references `refs` (indices into `t`'s per-reference
/// tables; `reference(k)` is the text of the k-th of them).
pub(super) fn chrf_segment<'r>(
cfg: &ScoreConfig,
t: &ChrfTables<'_>,
refs: std::ops::Range<usize>,
reference: impl Fn(usize) -> &'r str,
hyp: &str,
s: &mut Scratch,
out: &mut SegmentStats,
) {
if !chrf_packed(cfg, t, refs.clone(), &reference, hyp, s, out) {
    chrf_general(cfg, t, refs, &reference, hyp, s, out);
}
}

/// chrF / chrF++ by packed keys; false when some n-gram does not fit the widest key (then
/// `out` is to be filled by [`chrf_general`]).
fn chrf_packed<'r>(
cfg: &ScoreConfig,
t: &ChrfTables<'_>,
refs: std::ops::Range<usize>,
reference: &impl Fn(usize) -> &'r str,
hyp: &str,
s: &mut Scratch,
out: &mut SegmentStats,
) -> bool {
    let (c_order, w_order) = (cfg.max_chars(), cfg.max_words());
    let p = &mut s.packed;
    let hyp_max = char_items(hyp, cfg.caseless, &mut s.lower, &mut s.hyp_chars);
    let hyp_len = s.hyp_chars.len();
    p.hyp_chars.reset();
    p.hyp_words.reset();
    // Word ids: interned ids from 1, one more id for every word the references lack.
    let unknown_word = t.words.len() as u32 + 1;
    if t.word_seqs.is_some() {
        let text = if cfg.caseless { s.lower.as_str() } else { hyp };
        s.hyp_words.clear();
        s.hyp_words.extend(text.split(is_space).filter(|w| !w.is_empty()).map(|w| match t.words.get(w.as_bytes()) {
            super::intern::UNKNOWN => unknown_word,
            id => id,
        }));
    }
    let mut best = Best::new(out);
    for (k, r) in refs.enumerate() {
        let ref_max = char_items(reference(k), cfg.caseless, &mut s.lower, &mut p.ref_items);
        let by = t.char_orders.as_ref().map_or(RefOrder::Unknown, |o| o.get(r, p.ref_items.len()));
        let mut st = ChrfStats::default();
        if !packed_counts(c_order, hyp_max.max(ref_max), &s.hyp_chars, &mut p.hyp_chars, &p.ref_items, by, &mut p.bufs, &mut st.char.matches) {
            return false;
        }
        let ref_len = p.ref_items.len();
        for n in 1..=c_order {
            st.char.hyp[n - 1] = ngram_count(hyp_len, n);
            st.char.reference[n - 1] = ngram_count(ref_len, n);
        }
        if let Some(ws) = t.word_seqs {
            let words = &ws.seq[ws.range(r)];
            if !packed_counts(w_order, unknown_word, &s.hyp_words, &mut p.hyp_words, words, RefOrder::Unknown, &mut p.bufs, &mut st.word.matches) {
                return false;
            }
            for n in 1..=w_order {
                st.word.hyp[n - 1] = ngram_count(s.hyp_words.len(), n);
                st.word.reference[n - 1] = ngram_count(words.len(), n);
            }
        }
        best.offer(cfg, &st, k, out);
    }
    true
}

/// chrF / chrF++ for any orders and characters, sorting positions by item slices.
fn chrf_general<'r>(
cfg: &ScoreConfig,
t: &ChrfTables<'_>,
refs: std::ops::Range<usize>,
reference: &impl Fn(usize) -> &'r str,
hyp: &str,
s: &mut Scratch,
out: &mut SegmentStats,
) {
    let (c_order, w_order) = (cfg.max_chars(), cfg.max_words());
    s.lower.clear();
    push_lowercased(hyp, cfg.caseless, &mut s.lower);
    char_codes(&s.lower, c_order, &mut s.hyp_chars);
    let hyp_len = s.hyp_chars.len() - c_order;
    sort_positions(&s.hyp_chars, hyp_len, c_order, &mut s.hyp_char_pos);
    let mut hyp_words = 0;
    if t.word_seqs.is_some() {
        s.hyp_words.clear();
        s.hyp_words.extend(s.lower.split(is_space).filter(|w| !w.is_empty()).map(|w| t.words.get(w.as_bytes())));
        hyp_words = s.hyp_words.len();
        s.hyp_words.extend(std::iter::repeat_n(0, w_order));
        sort_positions(&s.hyp_words, hyp_words, w_order, &mut s.hyp_word_pos);
    }
    let mut best = Best::new(out);
    for (k, r) in refs.enumerate() {
        s.lower.clear();
        push_lowercased(reference(k), cfg.caseless, &mut s.lower);
        char_codes(&s.lower, c_order, &mut s.ref_chars);
        let ref_len = s.ref_chars.len() - c_order;
        sort_positions(&s.ref_chars, ref_len, c_order, &mut s.ref_char_pos);
        let mut st = ChrfStats::default();
        count_orders(c_order, (&s.hyp_chars, &s.hyp_char_pos, hyp_len), (&s.ref_chars, &s.ref_char_pos, ref_len), &mut st.char);
        if let Some(ws) = t.word_seqs {
            let range = ws.range(r);
            let wseq = &ws.seq[range.start..range.end + ws.pad];
            sort_positions(wseq, range.len(), w_order, &mut s.ref_word_pos);
            count_orders(w_order, (&s.hyp_words, &s.hyp_word_pos, hyp_words), (wseq, &s.ref_word_pos, range.len()), &mut st.word);
        }
        best.offer(cfg, &st, k, out);
    }
}

/// The several-references rule of chrF and chrF++: per metric, the statistics of the reference
/// with the best sentence-level F (ties keep the earlier reference), restricted to the metric's
/// own orders.
struct Best {
    chrf: f64,
    chrfpp: f64,
}

impl Best {
    /// Start a segment: `out`'s chrF-family parts are cleared.
    fn new(out: &mut SegmentStats) -> Best {
        (out.chrf, out.chrf_ref, out.chrfpp, out.chrfpp_ref) = Default::default();
        Best { chrf: f64::NEG_INFINITY, chrfpp: f64::NEG_INFINITY }
    }

    /// Offer reference `k`'s statistics (counted to the largest orders configured).
    #[inline]
    fn offer(&mut self, cfg: &ScoreConfig, st: &ChrfStats, k: usize, out: &mut SegmentStats) {
        let slots = [(cfg.metrics.chrf, &mut self.chrf, &mut out.chrf, &mut out.chrf_ref), (cfg.metrics.chrfpp, &mut self.chrfpp, &mut out.chrfpp, &mut out.chrfpp_ref)];
        for (params, best, stats, chosen) in slots {
            let Some(p) = params else { continue };
            let f = st.score(p.chars, p.words, p.beta).score;
            if f > *best {
                *best = f;
                *stats = st.up_to(p.chars, p.words);
                *chosen = k as u32;
            }
        }
    }
}

/// Character codes (code point + 1, so 0 is free for padding) of the non-space characters of
/// `text`, followed by `pad` zeros.
fn char_codes(text: &str, pad: usize, out: &mut Vec<u32>) {
    out.clear();
    out.extend(text.chars().filter(|&c| !is_space(c)).map(|c| c as u32 + 1));
    out.extend(std::iter::repeat_n(0, pad));
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
