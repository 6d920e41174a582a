//! One-shot corpus scoring of line-aligned files, without compiling the references.
//!
//! [`super::compiled::Compiled`] builds tables the daemon keeps for many hypotheses against one
//! reference set. Scoring one hypothesis file once needs none of them: here each segment's
//! references and hypothesis are tokenized and counted together, and nothing outlives the
//! segment but the integer statistics added into the corpus sums.
//!
//! BLEU: a segment's tokens get dense ids (a table cleared per segment); each position links to
//! the previous position of the same token in the references and in the hypothesis (set as the
//! tokens are read), and the
//! clipped matches of every order come from the lengths of the common runs that start at equal
//! tokens ([`Clip`]): no n-gram is hashed or stored. A segment where a few tokens repeat so
//! often that the pairs of equal tokens outnumber [`PAIRS_PER_TOKEN`] per token goes through
//! the gram table of [`super::compiled`], built for that segment alone. chrF and chrF++ use
//! the same per-segment functions as the compiled path, with per-segment word ids.
//!
//! [`score_readers`] reads the files chunk by chunk (a chunk is [`ONESHOT_CHUNK`] lines of
//! every file) on several threads: a thread takes the next chunk under a lock, which also feeds
//! the chunk's references to the reference set's digest (in file order), then scores it
//! alone. Memory is a chunk of every file and the buffers of each thread, whatever the number
//! of segments or the size of the files. Pure and synchronous: bytes in, statistics out.

use std::io::Read;
use std::sync::atomic::{AtomicBool, AtomicUsize, Ordering};
use std::sync::Mutex;

use super::compiled::{bleu_segment, chrf_segment, BleuBuild, BleuTable, token_key, ChrfTables, LongTokens, Scratch, Sequences};
use super::intern::Interner;
use crate::metric::ngram::ngram_count;
use crate::metric::{BleuParams, MAX_BLEU_ORDER, CorpusStats, ScoreConfig, SegmentStats};
use crate::text::{for_each_space_token, is_space, push_lowercased, TokenBuf, Tokenizer};

/// Segments (lines of every file) per unit of work of [`score_plain`].
pub const ONESHOT_CHUNK: usize = 2048;
/// Smallest token id table (slots).
const MIN_TABLE_SLOTS: usize = 64;
/// Distinct long tokens (8 bytes or more) a thread's interner holds before it is cleared between
/// segments.
const MAX_LONG_TOKENS: usize = 1 << 16;
/// Pairs of equal tokens per token (references and hypothesis) past which a segment's BLEU
/// statistics come from the gram table instead of [`Clip`] (whose work grows with the pairs).
pub const PAIRS_PER_TOKEN: usize = 16;
/// Bytes of digest input gathered before they are handed to the hash.
const DIGEST_BATCH: usize = 1 << 16;

/// Reusable per-thread buffers of [`score_segment`].
#[derive(Default)]
pub struct SegmentScratch {
    tok: TokenBuf,
    ids: TokenIds,
    clip: Clip,
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

/// 64 well-mixed bits of a token key.
#[inline(always)]
fn mix(key: u64) -> u64 {
    (key ^ (key >> 29)).wrapping_mul(0x9E37_79B9_7F4A_7C15)
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

    /// The id of token `text[a..e]`, given one if new.
    #[inline(always)]
    fn id(&mut self, text: &[u8], a: usize, e: usize) -> u32 {
        let key = token_key(text, a, e, &mut LongTokens::Add(&mut self.long));
        let mask = self.slots.len() - 1;
        let mut i = (mix(key) >> self.shift) as usize;
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
            let mut i = (mix(k) >> self.shift) as usize;
            while self.slots[i].1 == gen {
                i = (i + 1) & (n - 1);
            }
            self.slots[i] = (k, g, id);
        }
    }
}

fn bleu(cfg: &ScoreConfig, p: BleuParams, refs: &[&str], hyp: &str, s: &mut SegmentScratch, out: &mut SegmentStats) {
    s.ids.clear();
    let (ids, tok, clip) = (&mut s.ids, &mut s.tok, &mut s.clip);
    clip.start();
    for (k, r) in refs.iter().enumerate() {
        for_each_token(cfg, r, tok, |t, a, e| clip.push_ref(ids.id(t, a, e)));
        clip.end_ref(k as u32);
    }
    for_each_token(cfg, hyp, tok, |t, a, e| clip.push_hyp(ids.id(t, a, e)));
    let st = &mut out.bleu;
    *st = Default::default();
    if !clip.count(p.order, &mut st.matches) {
        let (table, build) = s.fallback.get_or_insert_with(|| (BleuTable::new(p.order, p.ref_length), BleuBuild::default()));
        table.reset(p.order, p.ref_length);
        table.push_segment(cfg, refs.iter().copied(), build);
        bleu_segment(cfg, table, 0, 0..refs.len(), hyp, &mut s.scratch, out);
        return;
    }
    let len = clip.hyp_ids.len();
    for n in 1..=p.order {
        st.totals[n - 1] = ngram_count(len, n);
    }
    st.hyp_len = len as u64;
    let mut start = 0;
    st.ref_len = p.ref_length.pick(
        len as u64,
        clip.ref_ends.iter().map(|&e| {
            let l = (e - start) as u64;
            start = e + 1;
            l
        }),
    );
}

/// No position.
const NONE: u32 = u32::MAX;

/// Counts per order, one lane each (i32: the lanes compare as signed vector code).
type Lanes = [i32; MAX_BLEU_ORDER];

/// `RUNS[r]`: one in the lanes of the orders up to `r`.
const RUNS: [Lanes; MAX_BLEU_ORDER + 1] = {
    let mut t = [[0; MAX_BLEU_ORDER]; MAX_BLEU_ORDER + 1];
    let mut r = 0;
    while r <= MAX_BLEU_ORDER {
        let mut n = 0;
        while n < r {
            t[r][n] = 1;
            n += 1;
        }
        r += 1;
    }
    t
};

/// Add one to the counts of the orders up to `run` (at most [`MAX_BLEU_ORDER`]).
#[inline(always)]
fn lanes_count(counts: &mut Lanes, run: u64) {
    for (c, &one) in counts.iter_mut().zip(&RUNS[run as usize]) {
        *c += one;
    }
}

/// `best` the larger of itself and `cur`, order by order.
#[inline(always)]
fn lanes_max(best: &mut Lanes, cur: &Lanes) {
    for (b, &c) in best.iter_mut().zip(cur) {
        *b = (*b).max(c);
    }
}

/// Clipped n-gram matches of one segment without n-gram tables.
///
/// For hypothesis position `i` and a position `j` holding the same token, `run(i, j)` is the
/// length of the common run of tokens from there (capped at the order): one more than
/// `run(i + 1, j + 1)`. Each position links to the previous one holding the same token, so
/// going through the hypothesis backwards visits only the pairs of equal tokens, and keeping
/// the runs by the parity of `i` leaves row `i + 1` in place while row `i` is made. The n-gram
/// at `i` then occurs in a reference as often as that reference's positions with a run of at
/// least `n`, and earlier in the hypothesis as often as earlier hypothesis positions with such
/// a run; counting a hypothesis occurrence as matched while fewer earlier ones were than the
/// largest count in any one reference sums, over the distinct n-grams g,
/// `min(count_hyp(g), max_ref count_ref(g))`: the clipped count of Papineni et al. 2002.
/// A hypothesis token no reference has starts no n-gram that matches, so its row is skipped
/// (rows before it only read runs through it for n-grams that cannot match either).
#[derive(Default)]
struct Clip {
    /// Token ids of the references, each reference ended by id 0 (no token has it).
    ref_ids: Vec<u32>,
    /// The reference of each position of `ref_ids`.
    ref_of: Vec<u32>,
    /// Where each reference ends in `ref_ids`.
    ref_ends: Vec<usize>,
    hyp_ids: Vec<u32>,
    /// Per token id, its last position so far in the references and in the hypothesis.
    ref_last: Vec<u32>,
    hyp_last: Vec<u32>,
    /// Per position, the previous one holding the same token id.
    ref_prev: Vec<u32>,
    hyp_prev: Vec<u32>,
    /// Per row parity and position: `stamp << 8 | run` (runs of reference positions, and of
    /// earlier hypothesis positions).
    ref_cells: [Vec<u64>; 2],
    hyp_cells: [Vec<u64>; 2],
    /// The last row stamp given out (stamps never repeat, so the cells are never cleared).
    stamp: u64,
}

impl Clip {
    /// Start a segment.
    fn start(&mut self) {
        for v in [&mut self.ref_ids, &mut self.ref_of, &mut self.hyp_ids, &mut self.ref_prev, &mut self.hyp_prev] {
            v.clear();
        }
        self.ref_ends.clear();
        self.ref_last.clear();
        self.hyp_last.clear();
    }

    /// Room in the per-id tables for `id`.
    #[inline(always)]
    fn see(&mut self, id: u32) {
        if id as usize >= self.ref_last.len() {
            self.ref_last.resize(id as usize + 1, NONE);
            self.hyp_last.resize(id as usize + 1, NONE);
        }
    }

    /// The next token of the current reference.
    #[inline(always)]
    fn push_ref(&mut self, id: u32) {
        self.see(id);
        let last = &mut self.ref_last[id as usize];
        self.ref_prev.push(*last);
        *last = self.ref_ids.len() as u32;
        self.ref_ids.push(id);
    }

    /// The end of reference `k`.
    fn end_ref(&mut self, k: u32) {
        self.ref_ends.push(self.ref_ids.len());
        self.ref_ids.push(0);
        self.ref_prev.push(NONE);
        self.ref_of.resize(self.ref_ids.len(), k);
    }

    /// The next hypothesis token.
    #[inline(always)]
    fn push_hyp(&mut self, id: u32) {
        self.see(id);
        let last = &mut self.hyp_last[id as usize];
        self.hyp_prev.push(*last);
        *last = self.hyp_ids.len() as u32;
        self.hyp_ids.push(id);
    }

    /// Add the clipped matches of orders 1..=`order` (at most [`MAX_BLEU_ORDER`]) of the
    /// hypothesis against the references into `matches`. False (and nothing added) when the
    /// pairs of equal tokens are more than [`PAIRS_PER_TOKEN`] per token.
    fn count(&mut self, order: usize, matches: &mut [u64]) -> bool {
        let cap = order as u64;
        let (nr, nh) = (self.ref_ids.len(), self.hyp_ids.len());
        for c in self.ref_cells.iter_mut() {
            if c.len() <= nr {
                c.resize(nr + 1, 0);
            }
        }
        for c in self.hyp_cells.iter_mut() {
            if c.len() <= nh {
                c.resize(nh + 1, 0);
            }
        }
        // Row i has stamp base + (nh - i); row nh (past the end) is never written.
        let base = self.stamp + 1;
        self.stamp = base + nh as u64;
        let budget = PAIRS_PER_TOKEN * (nr + nh);
        let mut pairs = 0;
        let several = self.ref_ends.len() > 1;
        // Per order (all MAX_BLEU_ORDER lanes, so that the loops are straight vector code: the
        // orders past `order` stay 0, as runs are capped at `order`).
        let mut found: Lanes = [0; MAX_BLEU_ORDER];
        for i in (0..nh).rev() {
            let id = self.hyp_ids[i] as usize;
            let mut j = self.ref_last[id];
            if j == NONE {
                continue;
            }
            let here = base + (nh - i) as u64;
            let next = here - 1;
            let [even, odd] = &mut self.ref_cells;
            let (read, write) = if i & 1 == 0 { (&*odd, even) } else { (&*even, odd) };
            // Largest count in any one reference of each order's n-gram from `i`.
            let mut best: Lanes = [0; MAX_BLEU_ORDER];
            let mut cur: Lanes = [0; MAX_BLEU_ORDER];
            let mut owner = self.ref_of[j as usize];
            while j != NONE {
                let ju = j as usize;
                pairs += 1;
                if several && self.ref_of[ju] != owner {
                    owner = self.ref_of[ju];
                    lanes_max(&mut best, &cur);
                    cur = [0; MAX_BLEU_ORDER];
                }
                let c = read[ju + 1];
                let run = if c >> 8 == next { ((c & 0xFF) + 1).min(cap) } else { 1 };
                write[ju] = here << 8 | run;
                lanes_count(&mut cur, run);
                j = self.ref_prev[ju];
            }
            lanes_max(&mut best, &cur);
            // Earlier hypothesis occurrences of each order's n-gram from `i`.
            let [even, odd] = &mut self.hyp_cells;
            let (read, write) = if i & 1 == 0 { (&*odd, even) } else { (&*even, odd) };
            let mut seen: Lanes = [0; MAX_BLEU_ORDER];
            let mut e = self.hyp_prev[i];
            while e != NONE {
                let eu = e as usize;
                pairs += 1;
                let c = read[eu + 1];
                let run = if c >> 8 == next { ((c & 0xFF) + 1).min(cap) } else { 1 };
                write[eu] = here << 8 | run;
                lanes_count(&mut seen, run);
                e = self.hyp_prev[eu];
            }
            if pairs > budget {
                return false;
            }
            for n in 0..MAX_BLEU_ORDER {
                found[n] += (seen[n] < best[n]) as i32;
            }
        }
        for (m, f) in matches.iter_mut().zip(found) {
            *m += f as u64;
        }
        true
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

/// Bytes asked of a file per read.
const READ_BLOCK: usize = 1 << 16;

/// One file's lines as [`super::split_lines`] reads them (a byte-order mark dropped, the last
/// `\n` ending the last line, a `\r` before `\n` dropped), read a chunk at a time.
struct LineReader<R> {
    src: R,
    /// Bytes read past the lines handed out so far.
    carry: Vec<u8>,
    /// Whether the start of the file (a byte-order mark) has been looked at.
    started: bool,
    eof: bool,
}

/// One file's part of a chunk: whole lines, each ended by the index of its `\n` (or by the end
/// of the bytes for a last line without one).
#[derive(Default)]
struct Lines {
    bytes: Vec<u8>,
    ends: Vec<u32>,
}

impl Lines {
    /// The lines, `\r` endings dropped; `None` when they are not UTF-8.
    fn texts(&self) -> Option<impl Iterator<Item = &str>> {
        let text = std::str::from_utf8(&self.bytes).ok()?;
        let mut start = 0;
        Some(self.ends.iter().map(move |&e| {
            let line = &text[start..e as usize];
            start = e as usize + 1;
            line.strip_suffix('\r').unwrap_or(line)
        }))
    }

    /// The lines' bytes, `\r` endings dropped.
    fn raw(&self) -> impl Iterator<Item = &[u8]> {
        let mut start = 0;
        self.ends.iter().map(move |&e| {
            let line = &self.bytes[start..e as usize];
            start = e as usize + 1;
            line.strip_suffix(b"\r").unwrap_or(line)
        })
    }
}

impl<R: Read> LineReader<R> {
    fn new(src: R) -> Self {
        LineReader { src, carry: Vec::new(), started: false, eof: false }
    }

    /// Read up to `READ_BLOCK` more bytes onto `buf`.
    fn fill(&mut self, buf: &mut Vec<u8>) -> std::io::Result<()> {
        let got = (&mut self.src).take(READ_BLOCK as u64).read_to_end(buf)?;
        // `read_to_end` stops short of the limit only at the end of the file.
        self.eof = got < READ_BLOCK;
        Ok(())
    }

    /// The next (up to) `k` lines into `out`; how many. Err on a read error or a file past
    /// `u32::MAX` bytes in one chunk.
    fn take(&mut self, k: usize, out: &mut Lines) -> std::io::Result<usize> {
        out.bytes.clear();
        out.ends.clear();
        out.bytes.extend_from_slice(&self.carry);
        self.carry.clear();
        if !self.started {
            while out.bytes.len() < super::parse::BOM.len() && !self.eof {
                self.fill(&mut out.bytes)?;
            }
            if out.bytes.starts_with(super::parse::BOM) {
                out.bytes.drain(..super::parse::BOM.len());
            }
            self.started = true;
        }
        let mut scanned = 0;
        loop {
            for p in memchr::memchr_iter(b'\n', &out.bytes[scanned..]) {
                let end = scanned + p;
                out.ends.push(u32::try_from(end).map_err(|_| std::io::ErrorKind::InvalidData)?);
                if out.ends.len() == k {
                    self.carry.extend_from_slice(&out.bytes[end + 1..]);
                    out.bytes.truncate(end + 1);
                    return Ok(k);
                }
            }
            scanned = out.bytes.len();
            if self.eof {
                let last = out.ends.last().map_or(0, |&e| e as usize + 1);
                if last < out.bytes.len() {
                    out.ends.push(u32::try_from(out.bytes.len()).map_err(|_| std::io::ErrorKind::InvalidData)?);
                }
                return Ok(out.ends.len());
            }
            self.fill(&mut out.bytes)?;
        }
    }
}

/// What the threads of [`score_readers`] share, behind a lock: the files, and the digest of
/// the references read so far.
struct Shared<R> {
    /// The hypothesis file first, then the references.
    files: Vec<LineReader<R>>,
    /// Segments handed out.
    segments: usize,
    digest: super::SetDigest,
    /// Digest input not hashed yet.
    batch: Vec<u8>,
    /// Bytes a [`super::RefSet`] would keep for the text (ids and references).
    arena: usize,
    /// The end of the files was reached.
    finished: bool,
}

impl<R: Read> Shared<R> {
    /// The next chunk of every file into `out` (one [`Lines`] per file); its first segment and
    /// its number of lines (0 at the end). Err when the files cannot be read or their line
    /// counts differ. The references' lines go into the digest, in order.
    fn next(&mut self, out: &mut [Lines]) -> Result<(usize, usize), ()> {
        if self.finished {
            return Ok((self.segments, 0));
        }
        let mut lines = None;
        for (f, o) in self.files.iter_mut().zip(out.iter_mut()) {
            let n = f.take(ONESHOT_CHUNK, o).map_err(|_| ())?;
            if *lines.get_or_insert(n) != n {
                return Err(());
            }
        }
        let lines = lines.unwrap_or(0);
        if lines < ONESHOT_CHUNK {
            self.finished = true;
        }
        let first = self.segments;
        let refs = &out[1..];
        let mut texts: Vec<_> = refs.iter().map(Lines::raw).collect();
        for s in first + 1..=first + lines {
            let mut id = itoa_buf(s);
            let id = id.as_str();
            self.arena += id.len();
            super::SetDigest::segment_head(&mut self.batch, id.as_bytes(), None, refs.len());
            for t in &mut texts {
                let line = t.next().ok_or(())?;
                self.arena += line.len();
                super::SetDigest::field(&mut self.batch, line);
            }
            if self.batch.len() >= DIGEST_BATCH {
                self.digest.update(&self.batch);
                self.batch.clear();
            }
        }
        self.segments += lines;
        Ok((first, lines))
    }
}

/// [`score_readers`] on files already in memory.
pub fn score_plain(cfg: &ScoreConfig, refs: &[&[u8]], hyp: &[u8], threads: usize, done: &AtomicUsize) -> Option<PlainScored> {
    score_readers(cfg, refs.to_vec(), hyp, threads, done)
}

/// Score the hypothesis file `hyp` against line-aligned reference files `refs` (at least one)
/// on `threads` threads, counting scored segments in `done`. The files are read a chunk at a
/// time ([`ONESHOT_CHUNK`] lines of each), so memory is a few chunks per thread whatever their
/// length. `None` when the input is not what [`super::load`] and [`super::split_lines`]
/// accept with equal line counts (a read error, invalid UTF-8, differing line counts, a set
/// too large): the caller then reads the files the long way, which words the error. The
/// statistics equal [`super::compiled::Compiled::score_corpus`]'s, the digest
/// [`super::RefSet::digest`]'s, and neither depends on `threads`.
pub fn score_readers<R: Read + Send>(cfg: &ScoreConfig, refs: Vec<R>, hyp: R, threads: usize, done: &AtomicUsize) -> Option<PlainScored> {
    let streams = refs.len();
    if streams == 0 {
        return None;
    }
    let files: Vec<LineReader<R>> = std::iter::once(hyp).chain(refs).map(LineReader::new).collect();
    let shared = Mutex::new(Shared {
        files,
        segments: 0,
        digest: super::SetDigest::new(),
        batch: Vec::with_capacity(DIGEST_BATCH + 4096),
        arena: 0,
        finished: false,
    });
    let failed = AtomicBool::new(false);
    let work = || {
        let mut s = SegmentScratch::default();
        let mut one = SegmentStats::default();
        let mut sum = CorpusStats::default();
        let mut bufs: Vec<Lines> = (0..=streams).map(|_| Lines::default()).collect();
        let (bleu, chrf) = (cfg.metrics.bleu.is_some(), cfg.any_chrf());
        while !failed.load(Ordering::Relaxed) {
            let next = shared.lock().map_err(|_| ()).and_then(|mut sh| sh.next(&mut bufs));
            let lines = match next {
                Ok((_, 0)) => break,
                Ok((_, n)) => n,
                Err(()) => {
                    failed.store(true, Ordering::Relaxed);
                    break;
                }
            };
            let Some(mut files) = bufs.iter().map(Lines::texts).collect::<Option<Vec<_>>>() else {
                failed.store(true, Ordering::Relaxed);
                break;
            };
            let mut texts: Vec<&str> = Vec::with_capacity(streams + 1);
            for _ in 0..lines {
                texts.clear();
                texts.extend(files.iter_mut().map_while(Iterator::next));
                if texts.len() != streams + 1 {
                    failed.store(true, Ordering::Relaxed);
                    return sum;
                }
                score_configured(cfg, &texts[1..], texts[0], &mut s, &mut one);
                sum.add_scored_parts(&one, bleu, chrf);
            }
            done.fetch_add(lines, Ordering::Relaxed);
        }
        sum
    };
    let stats = if threads <= 1 {
        work()
    } else {
        std::thread::scope(|sc| {
            let helpers: Vec<_> = (1..threads).map(|_| sc.spawn(work)).collect();
            let mut stats = work();
            for h in helpers {
                stats += h.join().expect("scoring thread panicked");
            }
            stats
        })
    };
    let mut sh = shared.into_inner().ok()?;
    if failed.load(Ordering::Relaxed) || u32::try_from(sh.arena).is_err() {
        return None;
    }
    let batch = std::mem::take(&mut sh.batch);
    sh.digest.update(&batch);
    Some(PlainScored { stats, segments: sh.segments, references: sh.segments * streams, digest: sh.digest.finish() })
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

#[cfg(test)]
mod tests {
    use super::*;

    /// The clipped matches (orders 1..=`order`) of hypothesis ids `hyp` against references
    /// `refs`, or None when left to the gram table.
    fn clipped(order: usize, refs: &[&[u32]], hyp: &[u32], clip: &mut Clip) -> Option<Vec<u64>> {
        clip.start();
        for (k, r) in refs.iter().enumerate() {
            r.iter().for_each(|&id| clip.push_ref(id));
            clip.end_ref(k as u32);
        }
        hyp.iter().for_each(|&id| clip.push_hyp(id));
        let mut m = [0u64; MAX_BLEU_ORDER];
        let ok = clip.count(order, &mut m);
        assert!(ok || m == [0; MAX_BLEU_ORDER], "nothing added when refused");
        ok.then(|| m[..order].to_vec())
    }

    /// Reference `a b a b a b c` (ids 1 2 3), hypothesis `a b a b c a b a b`, counted by hand:
    /// unigrams a 3 of 4, b 3 of 4, c 1; bigrams ab 3, ba 2, bc 1; trigrams aba 2, bab 2,
    /// abc 1; 4-grams abab 2, babc 1. One scratch over several segments (stamps never repeat).
    #[test]
    fn runs_give_the_hand_counted_clipped_matches() {
        let mut clip = Clip::default();
        for _ in 0..3 {
            assert_eq!(clipped(4, &[&[1, 2, 1, 2, 1, 2, 3]], &[1, 2, 1, 2, 3, 1, 2, 1, 2], &mut clip), Some(vec![7, 6, 5, 3]));
            // References `a b` and `c a b a b`, hypothesis `a b a b a b`: the largest count in
            // any one reference clips (a 2, b 2; ab 2 from the second, ba 1).
            assert_eq!(clipped(2, &[&[1, 2], &[3, 1, 2, 1, 2]], &[1, 2, 1, 2, 1, 2], &mut clip), Some(vec![4, 3]));
            // A hypothesis token no reference has (4) breaks the runs through it.
            assert_eq!(clipped(3, &[&[1, 2, 3, 1, 2, 3]], &[1, 2, 4, 1, 2, 3], &mut clip), Some(vec![5, 3, 1]));
        }
    }

    #[test]
    fn too_many_equal_pairs_are_left_to_the_gram_table() {
        let n = 4 * PAIRS_PER_TOKEN;
        assert_eq!(clipped(4, &[&vec![1u32; n]], &vec![1; n], &mut Clip::default()), None);
        assert!(clipped(4, &[&[1, 1, 2]], &[1, 1], &mut Clip::default()).is_some());
    }
}
