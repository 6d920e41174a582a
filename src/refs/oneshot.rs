//! One-shot corpus scoring of line-aligned files, without compiling the references.
//!
//! [`super::compiled::Compiled`] builds tables the daemon keeps for many hypotheses against one
//! reference set. Scoring one hypothesis file once needs none of them: here each segment's
//! references and hypothesis are tokenized and counted together, and nothing outlives the
//! segment but the integer statistics added into the corpus sums.
//!
//! BLEU: a segment's tokens get dense ids (an interner cleared per segment); every n-gram of
//! orders 1..=order is packed into one `u64` / `u128` key and counted in a small open-addressing
//! table (a generation stamp clears it): per reference its count, kept as the largest over the
//! references (the clipping of Papineni et al. 2002); each hypothesis n-gram then matches while
//! its uses stay below that largest count. A segment whose ids do not fit a `u128` key goes
//! through the gram table of [`super::compiled`], built for that segment alone. chrF and chrF++
//! use the same per-segment functions as the compiled path, with per-segment word ids.
//!
//! [`score_plain`] reads the files chunk by chunk (a chunk is [`ONESHOT_CHUNK`] lines of every
//! file), on several threads, while one of them computes the reference set's digest; memory is
//! the input bytes and per-thread buffers, whatever the number of segments. Pure and
//! synchronous: bytes in, statistics out.

use std::sync::atomic::{AtomicBool, AtomicUsize, Ordering};
use std::sync::Mutex;

use super::compiled::{bleu_segment, chrf_segment, token_key, BleuBuild, BleuTable, ChrfTables, LongTokens, Scratch, Sequences};
use super::intern::Interner;
use crate::metric::ngram::{ngram_count, packed_bits, packed_fits, Packed};
use crate::metric::{BleuParams, CorpusStats, ScoreConfig, SegmentStats};
use crate::text::{for_each_space_token, is_space, push_lowercased, TokenBuf, Tokenizer};

/// Segments (lines of every file) per unit of work of [`score_plain`].
pub const ONESHOT_CHUNK: usize = 2048;
/// Smallest n-gram table (slots) of the BLEU counter.
const MIN_TABLE_SLOTS: usize = 64;
/// Distinct long tokens (8 bytes or more) a thread's interner holds before it is cleared between
/// segments.
const MAX_LONG_TOKENS: usize = 1 << 16;
/// Bytes of digest input gathered before they are handed to the hash.
const DIGEST_BATCH: usize = 1 << 16;

/// Reusable per-thread buffers of [`score_segment`].
#[derive(Default)]
pub struct SegmentScratch {
    tok: TokenBuf,
    ids: TokenIds,
    ref_ids: Vec<u32>,
    ref_ends: Vec<usize>,
    hyp_ids: Vec<u32>,
    unigrams: Unigrams,
    t64: ClipTable<u64>,
    t128: ClipTable<u128>,
    fallback: Option<(BleuTable, BleuBuild)>,
    words: Interner,
    word_seqs: Sequences,
    lower: String,
    scratch: Scratch,
}

/// The statistics of `hyp` against references `refs` for the metrics of `cfg` (unconfigured
/// parts of `out` are zeroed), equal to what [`super::compiled::Compiled::score_segment_into`]
/// gives for the same segment.
pub fn score_segment(cfg: &ScoreConfig, refs: &[&str], hyp: &str, s: &mut SegmentScratch, out: &mut SegmentStats) {
    score_configured(cfg, refs, hyp, s, out);
    if cfg.metrics.bleu.is_none() {
        out.bleu = Default::default();
    }
    if !cfg.any_chrf() {
        (out.chrf, out.chrf_ref, out.chrfpp, out.chrfpp_ref) = Default::default();
    }
}

/// [`score_segment`] for the configured metrics only (the other parts of `out` are left).
fn score_configured(cfg: &ScoreConfig, refs: &[&str], hyp: &str, s: &mut SegmentScratch, out: &mut SegmentStats) {
    if let Some(p) = cfg.metrics.bleu {
        bleu(cfg, p, refs, hyp, s, out);
    }
    if cfg.any_chrf() {
        let words = cfg.max_words();
        s.words.clear();
        s.word_seqs.reset(words);
        if words > 0 {
            for r in refs {
                s.lower.clear();
                push_lowercased(r, cfg.caseless, &mut s.lower);
                let ids = &mut s.words;
                s.word_seqs.push(s.lower.split(is_space).filter(|w| !w.is_empty()).map(|w| ids.intern(w.as_bytes())));
            }
        }
        let tables = ChrfTables { words: &s.words, word_seqs: (words > 0).then_some(&s.word_seqs), char_orders: None };
        chrf_segment(cfg, &tables, 0..refs.len(), |k| refs[k], hyp, &mut s.scratch, out);
    }
}

/// Call `f(text, start, end)` for every token of `text` as `cfg` tokenizes it (`text` the
/// tokenized text, the token its bytes `start..end`).
#[inline]
fn for_each_token(cfg: &ScoreConfig, text: &str, tok: &mut TokenBuf, mut f: impl FnMut(&[u8], usize, usize)) {
    if cfg.tokenizer == Tokenizer::Whitespace && !cfg.caseless {
        let bytes = text.as_bytes();
        for_each_space_token(text, |a, e| f(bytes, a, e));
    } else {
        cfg.tokenizer.tokenize_into(text, cfg.caseless, tok);
        let bytes = tok.text_bytes();
        for &(a, e) in tok.spans() {
            f(bytes, a as usize, e as usize);
        }
    }
}

/// Dense ids (from 1) of the tokens of one segment, by their keys ([`token_key`]: the bytes of a
/// token of up to 7 bytes, an interned id for a longer one), in a table cleared by bumping the
/// generation.
#[derive(Default)]
struct TokenIds {
    /// Key, generation, id.
    slots: Vec<(u64, u32, u32)>,
    gen: u32,
    shift: u32,
    len: u32,
    long: Interner,
}

impl TokenIds {
    fn clear(&mut self) {
        if self.slots.is_empty() {
            self.resize(MIN_TABLE_SLOTS);
        }
        if self.long.len() > MAX_LONG_TOKENS {
            self.long.clear();
        }
        self.len = 0;
        self.gen = self.gen.wrapping_add(1);
        if self.gen == 0 {
            self.slots.fill((0, 0, 0));
            self.gen = 1;
        }
    }

    fn len(&self) -> usize {
        self.len as usize
    }

    /// The id of token `text[a..e]`, given one if new.
    #[inline(always)]
    fn id(&mut self, text: &[u8], a: usize, e: usize) -> u32 {
        let key = token_key(text, a, e, &mut LongTokens::Add(&mut self.long));
        let mask = self.slots.len() - 1;
        let mut i = (key.mix() >> self.shift) as usize;
        loop {
            let (k, g, id) = self.slots[i];
            if g != self.gen {
                self.len += 1;
                self.slots[i] = (key, self.gen, self.len);
                let id = self.len;
                if 2 * self.len as usize >= self.slots.len() {
                    self.resize(2 * self.slots.len());
                }
                return id;
            }
            if k == key {
                return id;
            }
            i = (i + 1) & mask;
        }
    }

    /// A table of `n` slots holding this generation's entries.
    fn resize(&mut self, n: usize) {
        let old = std::mem::replace(&mut self.slots, vec![(0, 0, 0); n]);
        self.shift = 64 - n.trailing_zeros();
        let gen = self.gen;
        for (k, g, id) in old.into_iter().filter(|&(_, g, _)| g == gen) {
            let mut i = (k.mix() >> self.shift) as usize;
            while self.slots[i].1 == gen {
                i = (i + 1) & (n - 1);
            }
            self.slots[i] = (k, g, id);
        }
    }
}

fn bleu(cfg: &ScoreConfig, p: BleuParams, refs: &[&str], hyp: &str, s: &mut SegmentScratch, out: &mut SegmentStats) {
    let order = p.order;
    s.ids.clear();
    s.ref_ids.clear();
    s.ref_ends.clear();
    s.hyp_ids.clear();
    let (ids, tok) = (&mut s.ids, &mut s.tok);
    for r in refs {
        for_each_token(cfg, r, tok, |t, a, e| s.ref_ids.push(ids.id(t, a, e)));
        s.ref_ends.push(s.ref_ids.len());
    }
    for_each_token(cfg, hyp, tok, |t, a, e| s.hyp_ids.push(ids.id(t, a, e)));
    let max = ids.len() as u32;
    let st = &mut out.bleu;
    *st = Default::default();
    if packed_fits::<u64>(order, max) {
        s.unigrams.count(ids.len(), &s.ref_ids, &s.ref_ends);
        s.t64.clip(order, &s.ref_ids, &s.ref_ends, &s.hyp_ids, &mut s.unigrams, &mut st.matches);
    } else if packed_fits::<u128>(order, max) {
        s.unigrams.count(ids.len(), &s.ref_ids, &s.ref_ends);
        s.t128.clip(order, &s.ref_ids, &s.ref_ends, &s.hyp_ids, &mut s.unigrams, &mut st.matches);
    } else {
        let (table, build) = s.fallback.get_or_insert_with(|| (BleuTable::new(order, p.ref_length), BleuBuild::default()));
        table.reset(order, p.ref_length);
        table.push_segment(cfg, refs.iter().copied(), build);
        bleu_segment(cfg, table, 0, 0..refs.len(), hyp, &mut s.scratch, out);
        return;
    }
    let len = s.hyp_ids.len();
    for n in 1..=order {
        st.totals[n - 1] = ngram_count(len, n);
    }
    st.hyp_len = len as u64;
    let mut start = 0;
    st.ref_len = p.ref_length.pick(
        len as u64,
        s.ref_ends.iter().map(|&e| {
            let l = (e - start) as u64;
            start = e;
            l
        }),
    );
}

/// Clipping counts of single tokens, by dense id: no hashing for order 1.
#[derive(Default)]
struct Unigrams {
    /// Count in the reference being counted.
    count: Vec<u32>,
    /// Largest count in any one reference.
    max: Vec<u32>,
    /// Hypothesis occurrences matched so far.
    used: Vec<u32>,
}

impl Unigrams {
    /// Count the references `ids` (ending at `ends`), ids in `1..=distinct`.
    fn count(&mut self, distinct: usize, ids: &[u32], ends: &[usize]) {
        for v in [&mut self.count, &mut self.max, &mut self.used] {
            v.clear();
            v.resize(distinct + 1, 0);
        }
        let mut start = 0;
        for &end in ends {
            let seq = &ids[start..end];
            start = end;
            for &id in seq {
                self.count[id as usize] += 1;
            }
            for &id in seq {
                let i = id as usize;
                self.max[i] = self.max[i].max(self.count[i]);
                self.count[i] = 0;
            }
        }
    }

    /// Whether a hypothesis occurrence of `id` matches (and count it if so); `None` when the
    /// references lack the token.
    #[inline(always)]
    fn matched(&mut self, id: u32) -> Option<bool> {
        let i = id as usize;
        let max = *self.max.get(i)?;
        if max == 0 {
            return None;
        }
        let hit = self.used[i] < max;
        self.used[i] += hit as u32;
        Some(hit)
    }
}

/// A key type of the BLEU n-gram table.
trait ClipKey: Packed + Eq {
    /// 64 well-mixed bits of the key.
    fn mix(self) -> u64;
}

impl ClipKey for u64 {
    #[inline(always)]
    fn mix(self) -> u64 {
        (self ^ (self >> 29)).wrapping_mul(0x9E37_79B9_7F4A_7C15)
    }
}

impl ClipKey for u128 {
    #[inline(always)]
    fn mix(self) -> u64 {
        ((self as u64) ^ ((self >> 64) as u64).rotate_left(31)).mix()
    }
}

/// One n-gram in the table.
#[derive(Clone, Copy, Default)]
struct Slot<K> {
    key: K,
    /// Generation the slot was filled in (older: empty).
    gen: u32,
    /// 1 + index of the reference `count` is of.
    reference: u32,
    /// Count in that reference.
    count: u32,
    /// Largest count in any one reference.
    max: u32,
    /// Hypothesis occurrences matched so far.
    used: u32,
}

/// N-gram counts of one segment, by open addressing (linear probing) over a power-of-two table
/// cleared by bumping the generation.
#[derive(Default)]
struct ClipTable<K> {
    slots: Vec<Slot<K>>,
    gen: u32,
    shift: u32,
}

impl<K: ClipKey> ClipTable<K> {
    /// Start a segment of at most `grams` distinct n-grams.
    fn start(&mut self, grams: usize) {
        let want = (2 * grams).next_power_of_two().max(MIN_TABLE_SLOTS);
        if self.slots.len() < want {
            self.slots = vec![Slot::default(); want];
            self.gen = 0;
        }
        self.gen = self.gen.wrapping_add(1);
        if self.gen == 0 {
            self.slots.fill(Slot::default());
            self.gen = 1;
        }
        self.shift = 64 - self.slots.len().trailing_zeros();
    }

    /// The slot of `key`, filled if absent.
    #[inline(always)]
    fn entry(&mut self, key: K) -> &mut Slot<K> {
        let mask = self.slots.len() - 1;
        let mut i = (key.mix() >> self.shift) as usize;
        loop {
            let s = self.slots[i];
            if s.gen != self.gen {
                self.slots[i] = Slot { key, gen: self.gen, ..Default::default() };
                return &mut self.slots[i];
            }
            if s.key == key {
                return &mut self.slots[i];
            }
            i = (i + 1) & mask;
        }
    }

    /// The slot of `key`, if present.
    #[inline(always)]
    fn find(&mut self, key: K) -> Option<&mut Slot<K>> {
        let mask = self.slots.len() - 1;
        let mut i = (key.mix() >> self.shift) as usize;
        loop {
            let s = self.slots[i];
            if s.gen != self.gen {
                return None;
            }
            if s.key == key {
                return Some(&mut self.slots[i]);
            }
            i = (i + 1) & mask;
        }
    }

    /// Clipped matches of orders 1..=`order` (into `matches`) of hypothesis ids `hyp` against
    /// the references `ids` (ending at `ends`); every id is at least 1 and fits
    /// [`packed_bits`]`::<K>(order)` bits, so that keys of different orders never meet.
    /// Order 1 is `uni`'s, counted already.
    fn clip(&mut self, order: usize, ids: &[u32], ends: &[usize], hyp: &[u32], uni: &mut Unigrams, matches: &mut [u64]) {
        let bits = packed_bits::<K>(order);
        self.start(ids.len() * (order - 1));
        let mut start = 0;
        for (r, &end) in ends.iter().enumerate() {
            let seq = &ids[start..end];
            start = end;
            let tag = r as u32 + 1;
            for i in 0..seq.len() {
                let mut key = K::from(seq[i]);
                for &id in &seq[i + 1..(i + order).min(seq.len())] {
                    key = (key << bits) | K::from(id);
                    let e = self.entry(key);
                    if e.reference != tag {
                        e.reference = tag;
                        e.count = 0;
                    }
                    e.count += 1;
                    e.max = e.max.max(e.count);
                }
            }
        }
        for i in 0..hyp.len() {
            // An n-gram the references lack extends to none they have.
            let Some(hit) = uni.matched(hyp[i]) else { continue };
            matches[0] += hit as u64;
            let mut key = K::from(hyp[i]);
            for (n, &id) in hyp[i + 1..(i + order).min(hyp.len())].iter().enumerate() {
                key = (key << bits) | K::from(id);
                let Some(e) = self.find(key) else { break };
                if e.used < e.max {
                    e.used += 1;
                    matches[n + 1] += 1;
                }
            }
        }
    }
}

/// The outcome of [`score_plain`].
#[derive(Debug, Clone, PartialEq)]
pub struct PlainScored {
    /// Corpus statistics.
    pub stats: CorpusStats,
    /// Number of segments (lines).
    pub segments: usize,
    /// Number of references (segments times reference files).
    pub references: usize,
    /// The digest of the reference set the files make (as [`super::RefSet::digest`]).
    pub digest: [u8; 32],
}

/// The lines of one file as [`super::split_lines`] reads them (a byte-order mark dropped, the
/// last `\n` ending the last line, a `\r` before `\n` dropped), taken a chunk at a time.
#[derive(Clone, Copy)]
struct LineCursor<'a> {
    body: &'a [u8],
    pos: usize,
    more: bool,
}

impl<'a> LineCursor<'a> {
    fn new(bytes: &'a [u8]) -> Self {
        let bytes = bytes.strip_prefix(super::parse::BOM).unwrap_or(bytes);
        let more = !bytes.is_empty();
        LineCursor { body: bytes.strip_suffix(b"\n").unwrap_or(bytes), pos: 0, more }
    }

    /// Up to `k` more lines: their bytes (lines still joined by `\n`) and how many.
    fn take(&mut self, k: usize) -> (&'a [u8], usize) {
        if !self.more || k == 0 {
            return (&[], 0);
        }
        let rest = &self.body[self.pos..];
        let mut newlines = memchr::memchr_iter(b'\n', rest);
        match newlines.nth(k - 1) {
            Some(end) => {
                self.pos += end + 1;
                (&rest[..end], k)
            }
            None => {
                self.more = false;
                (rest, memchr::memchr_iter(b'\n', rest).count() + 1)
            }
        }
    }
}

/// The lines of a chunk from [`LineCursor::take`], `\r` endings dropped.
fn chunk_lines(chunk: &[u8]) -> impl Iterator<Item = &[u8]> {
    let mut rest = Some(chunk);
    std::iter::from_fn(move || {
        let r = rest?;
        let line = match memchr::memchr(b'\n', r) {
            Some(i) => {
                rest = Some(&r[i + 1..]);
                &r[..i]
            }
            None => {
                rest = None;
                r
            }
        };
        Some(line.strip_suffix(b"\r").unwrap_or(line))
    })
}

/// The next chunk of every file: the hypothesis first, then the references.
struct Chunks<'a> {
    files: Vec<LineCursor<'a>>,
    next_segment: usize,
}

/// One unit of work: `lines` lines of every file from segment `first`.
struct Chunk<'a> {
    first: usize,
    lines: usize,
    files: Vec<&'a [u8]>,
}

impl<'a> Chunks<'a> {
    /// The next chunk (None at the end); Err when the files' line counts differ.
    fn next(&mut self) -> Result<Option<Chunk<'a>>, ()> {
        let mut files = Vec::with_capacity(self.files.len());
        let mut lines = None;
        for f in &mut self.files {
            let (bytes, n) = f.take(ONESHOT_CHUNK);
            if *lines.get_or_insert(n) != n {
                return Err(());
            }
            files.push(bytes);
        }
        let lines = lines.unwrap_or(0);
        if lines == 0 {
            return Ok(None);
        }
        let first = self.next_segment;
        self.next_segment += lines;
        Ok(Some(Chunk { first, lines, files }))
    }
}

/// Score the hypothesis file `hyp` against line-aligned reference files `refs` (at least one)
/// on `threads` threads, counting scored segments in `done`. `None` when the input is not what
/// [`super::load`] and [`super::split_lines`] accept with equal line counts (invalid UTF-8,
/// differing line counts, a set too large): the caller then reads the files the long way,
/// which words the error. The statistics equal [`super::compiled::Compiled::score_corpus`]'s,
/// the digest [`super::RefSet::digest`]'s, and neither depends on `threads`.
pub fn score_plain(cfg: &ScoreConfig, refs: &[&[u8]], hyp: &[u8], threads: usize, done: &AtomicUsize) -> Option<PlainScored> {
    if refs.is_empty() {
        return None;
    }
    let files: Vec<LineCursor<'_>> = std::iter::once(hyp).chain(refs.iter().copied()).map(LineCursor::new).collect();
    let chunks = Mutex::new(Chunks { files, next_segment: 0 });
    let failed = AtomicBool::new(false);
    let segments = AtomicUsize::new(0);
    let work = || {
        let mut s = SegmentScratch::default();
        let mut one = SegmentStats::default();
        let mut sum = CorpusStats::default();
        let mut texts: Vec<&str> = Vec::with_capacity(refs.len() + 1);
        let mut lines: Vec<_> = Vec::with_capacity(refs.len() + 1);
        let (bleu, chrf) = (cfg.metrics.bleu.is_some(), cfg.any_chrf());
        while !failed.load(Ordering::Relaxed) {
            let chunk = match chunks.lock().map_err(|_| ()).and_then(|mut c| c.next()) {
                Ok(Some(c)) => c,
                Ok(None) => break,
                Err(()) => {
                    failed.store(true, Ordering::Relaxed);
                    break;
                }
            };
            lines.clear();
            lines.extend(chunk.files.iter().map(|f| chunk_lines(f)));
            for _ in 0..chunk.lines {
                texts.clear();
                for l in &mut lines {
                    match l.next().map(std::str::from_utf8) {
                        Some(Ok(t)) => texts.push(t),
                        _ => {
                            failed.store(true, Ordering::Relaxed);
                            return sum;
                        }
                    }
                }
                score_configured(cfg, &texts[1..], texts[0], &mut s, &mut one);
                sum.segments += 1;
                if bleu {
                    sum.bleu += one.bleu;
                }
                if chrf {
                    sum.chrf += one.chrf;
                    sum.chrfpp += one.chrfpp;
                }
            }
            segments.fetch_max(chunk.first + chunk.lines, Ordering::Relaxed);
            done.fetch_add(chunk.lines, Ordering::Relaxed);
        }
        sum
    };
    let (stats, digest) = if threads <= 1 {
        let digest = plain_digest(refs);
        (work(), digest)
    } else {
        std::thread::scope(|sc| {
            let helpers: Vec<_> = (1..threads).map(|_| sc.spawn(work)).collect();
            // This thread hashes the references, then joins the scoring.
            let digest = plain_digest(refs);
            let mut stats = work();
            for h in helpers {
                stats += h.join().expect("scoring thread panicked");
            }
            (stats, digest)
        })
    };
    if failed.load(Ordering::Relaxed) {
        return None;
    }
    let (digest, lines) = digest?;
    let segments = segments.load(Ordering::Relaxed);
    (lines == segments).then_some(PlainScored { stats, segments, references: segments * refs.len(), digest })
}

/// The digest of the reference set that line-aligned reference files make (segment ids the
/// line numbers from 1, no sources), as [`super::RefSet::new`] computes it, and the number of
/// segments; `None` when the files' line counts differ or the set is too large for a
/// [`super::RefSet`].
pub(super) fn plain_digest(refs: &[&[u8]]) -> Option<([u8; 32], usize)> {
    let mut files: Vec<_> = refs.iter().map(|r| LineCursor::new(r)).collect();
    let mut digest = super::SetDigest::new();
    let mut batch = Vec::with_capacity(DIGEST_BATCH + 4096);
    let mut texts = Vec::with_capacity(refs.len());
    let mut segments = 0usize;
    let mut arena = 0usize;
    loop {
        let mut chunk_lines_n = None;
        texts.clear();
        for f in &mut files {
            let (bytes, n) = f.take(ONESHOT_CHUNK);
            if *chunk_lines_n.get_or_insert(n) != n {
                return None;
            }
            texts.push(chunk_lines(bytes));
        }
        let n = chunk_lines_n.unwrap_or(0);
        if n == 0 {
            break;
        }
        for _ in 0..n {
            segments += 1;
            let mut id = itoa_buf(segments);
            let id = id.as_str();
            arena += id.len();
            super::SetDigest::segment_head(&mut batch, id.as_bytes(), None, refs.len());
            for t in &mut texts {
                let line = t.next()?;
                arena += line.len();
                super::SetDigest::field(&mut batch, line);
            }
            if batch.len() >= DIGEST_BATCH {
                digest.update(&batch);
                batch.clear();
            }
        }
    }
    if u32::try_from(arena).is_err() {
        return None;
    }
    digest.update(&batch);
    Some((digest.finish(), segments))
}

/// Decimal digits of `n` without allocating.
struct Decimal {
    buf: [u8; 20],
    start: usize,
}

impl Decimal {
    fn as_str(&mut self) -> &str {
        std::str::from_utf8(&self.buf[self.start..]).unwrap_or("")
    }
}

fn itoa_buf(mut n: usize) -> Decimal {
    let mut d = Decimal { buf: [0; 20], start: 20 };
    loop {
        d.start -= 1;
        d.buf[d.start] = b'0' + (n % 10) as u8;
        n /= 10;
        if n == 0 {
            return d;
        }
    }
}
