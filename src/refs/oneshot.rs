//! One-shot corpus scoring of line-aligned files, without compiling the references.
//!
//! [`super::compiled::Compiled`] builds tables the daemon keeps for many hypotheses against one
//! reference set. Scoring one hypothesis file once needs none of them: here each segment's
//! references and hypothesis are tokenized and counted together, and nothing outlives the
//! segment but the integer statistics added into the corpus sums.
//!
//! BLEU: a segment's tokens get dense ids (a table cleared per segment); each token id's
//! positions in the references and in the hypothesis are listed (a counting sort), and the
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
    ref_ids: Vec<u32>,
    ref_of: Vec<u32>,
    ref_ends: Vec<usize>,
    hyp_ids: Vec<u32>,
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

    fn len(&self) -> usize {
        self.len as usize
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
    s.ref_ids.clear();
    s.ref_of.clear();
    s.ref_ends.clear();
    s.hyp_ids.clear();
    let (ids, tok) = (&mut s.ids, &mut s.tok);
    for (k, r) in refs.iter().enumerate() {
        for_each_token(cfg, r, tok, |t, a, e| s.ref_ids.push(ids.id(t, a, e)));
        s.ref_ends.push(s.ref_ids.len());
        // Id 0 ends every reference: no hypothesis token has it, so no match runs past the end.
        s.ref_ids.push(0);
        s.ref_of.resize(s.ref_ids.len(), k as u32);
    }
    for_each_token(cfg, hyp, tok, |t, a, e| s.hyp_ids.push(ids.id(t, a, e)));
    let st = &mut out.bleu;
    *st = Default::default();
    if !s.clip.count(p.order, ids.len(), &s.ref_ids, &s.ref_of, &s.hyp_ids, &mut st.matches) {
        let (table, build) = s.fallback.get_or_insert_with(|| (BleuTable::new(p.order, p.ref_length), BleuBuild::default()));
        table.reset(p.order, p.ref_length);
        table.push_segment(cfg, refs.iter().copied(), build);
        bleu_segment(cfg, table, 0, 0..refs.len(), hyp, &mut s.scratch, out);
        return;
    }
    let len = s.hyp_ids.len();
    for n in 1..=p.order {
        st.totals[n - 1] = ngram_count(len, n);
    }
    st.hyp_len = len as u64;
    let mut start = 0;
    st.ref_len = p.ref_length.pick(
        len as u64,
        s.ref_ends.iter().map(|&e| {
            let l = (e - start) as u64;
            start = e + 1;
            l
        }),
    );
}

/// The positions of each token id in one sequence, ascending, grouped by id (a counting sort).
#[derive(Default)]
struct Postings {
    /// Positions of id `k` are `pos[start[k]..start[k + 1]]`.
    start: Vec<u32>,
    pos: Vec<u32>,
}

impl Postings {
    /// Index `seq`, whose ids lie in `0..=max`.
    fn build(&mut self, max: usize, seq: &[u32]) {
        self.start.clear();
        self.start.resize(max + 2, 0);
        for &id in seq {
            self.start[id as usize] += 1;
        }
        let mut sum = 0;
        for c in &mut self.start {
            sum += *c;
            *c = sum;
        }
        self.pos.clear();
        self.pos.resize(seq.len(), 0);
        for (i, &id) in seq.iter().enumerate().rev() {
            let c = &mut self.start[id as usize];
            *c -= 1;
            self.pos[*c as usize] = i as u32;
        }
    }

    #[inline(always)]
    fn of(&self, id: u32) -> &[u32] {
        let k = id as usize;
        &self.pos[self.start[k] as usize..self.start[k + 1] as usize]
    }
}

/// Clipped n-gram matches of one segment without n-gram tables.
///
/// For hypothesis position `i` and a position `j` holding the same token, `run(i, j)` is the
/// length of the common run of tokens from there (capped at the order): one more than
/// `run(i + 1, j + 1)`. Going through the hypothesis backwards and through each token's
/// positions only, the runs of row `i + 1` are still in place when row `i` needs them. The
/// n-gram at `i` then occurs in a reference as often as that reference's positions with a run
/// of at least `n`, and earlier in the hypothesis as often as earlier hypothesis positions with
/// such a run; counting a hypothesis occurrence as matched while fewer earlier ones were than
/// the largest count in any one reference sums, over the distinct n-grams g,
/// `min(count_hyp(g), max_ref count_ref(g))`: the clipped count of Papineni et al. 2002.
#[derive(Default)]
struct Clip {
    refs: Postings,
    hyps: Postings,
    /// Per reference position: the hypothesis position its run is of, and the run.
    ref_row: Vec<u32>,
    ref_run: Vec<u8>,
    /// The same per hypothesis position (runs against later hypothesis positions).
    hyp_row: Vec<u32>,
    hyp_run: Vec<u8>,
}

impl Clip {
    /// Add the clipped matches of orders 1..=`order` of `hyp` against the references `ids`
    /// (each ended by id 0; `ref_of` the reference of each position) into `matches`; token ids
    /// lie in `1..=distinct`. False (and nothing added) when the pairs of equal tokens are too
    /// many ([`PAIRS_PER_TOKEN`]).
    fn count(&mut self, order: usize, distinct: usize, ids: &[u32], ref_of: &[u32], hyp: &[u32], matches: &mut [u64]) -> bool {
        let cap = order as u8;
        self.refs.build(distinct, ids);
        self.hyps.build(distinct, hyp);
        let budget = PAIRS_PER_TOKEN * (ids.len() + hyp.len());
        let mut pairs = 0;
        for id in 1..=distinct as u32 {
            let h = self.hyps.of(id).len();
            pairs += h * (self.refs.of(id).len() + h);
        }
        if pairs > budget {
            return false;
        }
        for (row, run, len) in [(&mut self.ref_row, &mut self.ref_run, ids.len()), (&mut self.hyp_row, &mut self.hyp_run, hyp.len())] {
            row.clear();
            row.resize(len + 1, u32::MAX);
            run.clear();
            run.resize(len + 1, 0);
        }
        for i in (0..hyp.len()).rev() {
            let id = hyp[i];
            let at = self.refs.of(id);
            if at.is_empty() {
                // No n-gram from here matches; rows before this one never need its runs for
                // an n-gram that could.
                continue;
            }
            let (here, next) = (i as u32, i as u32 + 1);
            // Largest count in any one reference of each order's n-gram from `i`.
            let mut best = [0u32; MAX_BLEU_ORDER];
            let mut cur = [0u32; MAX_BLEU_ORDER];
            let mut owner = ref_of[at[0] as usize];
            for &j in at {
                let j = j as usize;
                if ref_of[j] != owner {
                    owner = ref_of[j];
                    for n in 0..order {
                        best[n] = best[n].max(cur[n]);
                    }
                    cur = [0; MAX_BLEU_ORDER];
                }
                let run = if self.ref_row[j + 1] == next { (self.ref_run[j + 1] + 1).min(cap) } else { 1 };
                self.ref_row[j] = here;
                self.ref_run[j] = run;
                for c in &mut cur[..run as usize] {
                    *c += 1;
                }
            }
            for n in 0..order {
                best[n] = best[n].max(cur[n]);
            }
            // Earlier hypothesis occurrences of each order's n-gram from `i`.
            let mut seen = [0u32; MAX_BLEU_ORDER];
            for &e in self.hyps.of(id) {
                if e >= here {
                    break;
                }
                let e = e as usize;
                let run = if self.hyp_row[e + 1] == next { (self.hyp_run[e + 1] + 1).min(cap) } else { 1 };
                self.hyp_row[e] = here;
                self.hyp_run[e] = run;
                for c in &mut seen[..run as usize] {
                    *c += 1;
                }
            }
            for n in 0..order {
                matches[n] += (seen[n] < best[n]) as u64;
            }
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
                sum.segments += 1;
                if bleu {
                    sum.bleu += one.bleu;
                }
                if chrf {
                    sum.chrf += one.chrf;
                    sum.chrfpp += one.chrfpp;
                }
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

    /// Reference `a b a b a b c` (ids 1 2 3, ended by 0), hypothesis `a b a b c a b a b`, counted
    /// by hand: unigrams a 3 of 4, b 3 of 4, c 1; bigrams ab 3, ba 2, bc 1; trigrams aba 2,
    /// bab 2, abc 1; 4-grams abab 2, babc 1.
    #[test]
    fn runs_give_the_hand_counted_clipped_matches() {
        let refs = [1, 2, 1, 2, 1, 2, 3, 0];
        let hyp = [1, 2, 1, 2, 3, 1, 2, 1, 2];
        let mut clip = Clip::default();
        let mut m = [0u64; MAX_BLEU_ORDER];
        assert!(clip.count(4, 3, &refs, &[0; 8], &hyp, &mut m));
        assert_eq!(m[..4], [7, 6, 5, 3]);
        // References `a b` and `c a b a b`, hypothesis `a b a b a b`: the largest count in any one
        // reference clips (a 2, b 2; ab 2 from the second, ba 1).
        let refs = [1, 2, 0, 3, 1, 2, 1, 2, 0];
        let mut m = [0u64; MAX_BLEU_ORDER];
        assert!(clip.count(2, 3, &refs, &[0, 0, 0, 1, 1, 1, 1, 1, 1], &[1, 2, 1, 2, 1, 2], &mut m));
        assert_eq!(m[..2], [4, 3]);
    }

    #[test]
    fn too_many_equal_pairs_are_left_to_the_gram_table() {
        let n = 4 * PAIRS_PER_TOKEN;
        let mut refs = vec![1u32; n];
        refs.push(0);
        let mut m = [0u64; MAX_BLEU_ORDER];
        assert!(!Clip::default().count(4, 1, &refs, &vec![0; n + 1], &vec![1; n], &mut m));
        assert_eq!(m, [0; MAX_BLEU_ORDER], "nothing added");
    }
}
