//! One pass over each text for the guards: [`SourceFacts::of`] for a source (kept per reference
//! segment by a session, so a matched item's source is not read again) and [`scan_hypothesis`]
//! for a hypothesis: sixteen bytes at a time by SSE byte shuffles where the processor has them
//! (x86-64 with SSSE3, POPCNT, BMI1, BMI2 and LZCNT, checked at run time), else eight ASCII bytes
//! at a time in 64-bit words; Latin-1 letters and common punctuation on a short path, other
//! characters on the general one; the words are found in that pass and hashed from their bytes
//! in a second, short one. Both paths give the same scan (a property test holds them to each
//! other and to the definitions).

use super::script::{script_of, Script};
use super::vocab::Vocabulary;
use super::is_word_char;
use crate::text::{is_cjk, is_space};

/// Bits of the presence set: one per ordered pair of the 32 character classes ([`class_of`]).
pub(super) const PRESENCE_BITS: usize = 1 << 10;

/// The character-pair presence set of the copy guard's first bound.
/// Row `a` holds the pairs (a, b) as bit `b`.
pub(super) type PresenceSet = [u32; PRESENCE_BITS / 32];

const CLASS: u8 = 31;
const ALNUM: u8 = 32;
const ALPHA: u8 = 64;
const SPACE: u8 = 128;

/// Per ASCII byte: its class ([`class_of`] of its lowercase) and whether it is alphanumeric,
/// alphabetic, white space ([`crate::text::is_space`]).
static ASCII: [u8; 128] = ascii_table();

const fn ascii_table() -> [u8; 128] {
    let mut t = [0u8; 128];
    let mut i = 0;
    while i < 128 {
        let b = i as u8;
        // The class: the low five bits (the same for both cases of a letter).
        let mut e = b & 31;
        if b.is_ascii_alphanumeric() {
            e |= ALNUM;
        }
        if b.is_ascii_alphabetic() {
            e |= ALPHA;
        }
        if matches!(b, b' ' | b'\t' | b'\n' | 0x0B | 0x0C | b'\r' | 0x1C..=0x1F) {
            e |= SPACE;
        }
        t[i] = e;
        i += 1;
    }
    t
}

/// The class (0..32) of a lowercased character in the presence set: an ASCII character its low
/// five bits (each letter its own class, 1..=26, either case; digits and signs share classes
/// with letters), any other character its code point hashed to five bits. Equal characters
/// have equal classes, which is all the bound needs (characters sharing a class can only add
/// hits).
#[inline]
pub(super) fn class_of(l: char) -> u32 {
    let c = l as u32;
    if c < 128 {
        u32::from(ASCII[c as usize] & CLASS)
    } else {
        c.wrapping_mul(0x9E37_79B1) >> 27
    }
}

/// A Latin-1 letter (U+00C0..=U+00FF but the signs U+00D7 and U+00F7) and its lowercase (one
/// character; U+00DF and U+00FF are lowercase already).
#[inline]
fn latin1_letter(c: char) -> Option<char> {
    match c as u32 {
        0xD7 | 0xF7 => None,
        u @ 0xC0..=0xDE => char::from_u32(u + 0x20),
        0xDF..=0xFF => Some(c),
        _ => None,
    }
}

/// Punctuation and symbols of Latin-1, General Punctuation and Currency Symbols that are no
/// white space, letter, digit or mark and are their own lowercase (a short path for the
/// quotes, dashes and currency signs of Latin-script text).
#[inline]
fn plain_symbol(c: char) -> bool {
    matches!(c as u32, 0xA1..=0xA9 | 0xAB..=0xB1 | 0xB4 | 0xB6..=0xB8 | 0xBB | 0xBF | 0x2010..=0x2027 | 0x2030..=0x205E | 0x20A0..=0x20C0)
}

/// What the guards need of a source, from one pass over it: its non-space characters, its
/// lowercased non-space characters (what the copy chrF reads), whether it has a letter or
/// digit, and the presence set of its character pairs: 160 bytes whatever the source's length.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct SourceFacts {
    pub(super) presence: PresenceSet,
    pub(super) chars: u64,
    pub(super) lower: usize,
    /// Lowercased letters and digits (the length of [`super::alnum_lower`]).
    pub(super) alnum_lower: usize,
    pub(super) alnum: bool,
}

impl Default for SourceFacts {
    fn default() -> Self {
        SourceFacts { presence: [0; 32], chars: 0, lower: 0, alnum_lower: 0, alnum: false }
    }
}

impl SourceFacts {
    /// The facts of `source`.
    pub fn of(source: &str) -> SourceFacts {
        let mut f = SourceFacts::default();
        let mut prev: Option<u32> = None;
        let mut add = |set: &mut PresenceSet, cl: u32| {
            if let Some(p) = prev {
                set[p as usize] |= 1 << cl;
            }
            prev = Some(cl);
        };
        for c in source.chars() {
            if c.is_ascii() {
                let e = ASCII[c as usize];
                if e & SPACE == 0 {
                    f.chars += 1;
                    f.lower += 1;
                    f.alnum |= e & ALNUM != 0;
                    f.alnum_lower += usize::from(e & ALNUM != 0);
                    add(&mut f.presence, u32::from(e & CLASS));
                }
                continue;
            }
            if is_space(c) {
                continue;
            }
            f.chars += 1;
            let an = c.is_alphanumeric();
            f.alnum |= an;
            for l in c.to_lowercase() {
                f.lower += 1;
                f.alnum_lower += usize::from(an);
                add(&mut f.presence, class_of(l));
            }
        }
        f
    }
}

/// What one pass over a hypothesis gathers.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq)]
pub(super) struct HypScan {
    /// Non-space characters ([`super::char_len`]).
    pub chars: u64,
    /// Lowercased non-space characters (the length [`super::fill_chars`] returns).
    pub lower: usize,
    /// Whether it has a letter, mark or digit (`char::is_alphanumeric`).
    pub alnum: bool,
    /// Lowercased letters and digits (the length of [`super::alnum_lower`]).
    pub alnum_lower: usize,
    /// Letters ([`script_of`] is some).
    pub letters: usize,
    /// Letters in one of the target's scripts.
    pub expected: usize,
    /// Character pairs whose bit is set in the source's presence set.
    pub hits: u64,
    /// Words with a letter.
    pub lettered: usize,
    /// Words with a letter found in the vocabulary (0 without one).
    pub known: usize,
}

/// Multiplier of the word hash (the golden ratio's 64-bit fraction).
const WORD_K: u64 = 0x9E37_79B9_7F4A_7C15;

/// One 8-byte block into a word's hash.
#[inline]
fn word_block(h: u64, block: u64) -> u64 {
    (h ^ block).wrapping_mul(WORD_K).rotate_left(29)
}

/// A word's hash from its blocks' state and its length in bytes (never 0). Each step is a
/// bijection of the state, so two words of at most eight bytes never collide.
#[inline]
fn word_finish(h: u64, len: usize) -> u64 {
    (h ^ len as u64).wrapping_mul(WORD_K).max(1)
}

/// Start of a word's hash.
const WORD_SEED: u64 = 0xCBF2_9CE4_8422_2325;

/// Lowercase the ASCII letters of a block of a word's bytes: ASCII letters and digits, and
/// bytes of other characters (high bit set, left alone). ASCII letters have bit 0x40 and digits
/// not: that bit of each byte without the high bit, shifted to 0x20. Zero bytes stay zero.
#[inline]
fn lower_block(w: u64) -> u64 {
    w | ((w & 0x4040_4040_4040_4040 & ((!w & HIGH) >> 1)) >> 1)
}

/// The eight bytes of `text` from `i`, little-endian.
#[inline]
fn load8(text: &[u8], i: usize) -> u64 {
    u64::from_le_bytes(text[i..i + 8].try_into().unwrap_or([0; 8]))
}

/// [`word_id`] of a word of ASCII letters and digits, eight bytes at a time.
fn ascii_word_id(word: &[u8]) -> u64 {
    let mut h = WORD_SEED;
    let mut blocks = word.chunks(8);
    for b in &mut blocks {
        let w = b.iter().rev().fold(0u64, |w, &x| (w << 8) | u64::from(x));
        h = word_block(h, lower_block(w));
    }
    word_finish(h, word.len())
}

/// The bytes of a word's lowercased characters, gathered into blocks as [`word_id`] hashes them.
struct WordStream {
    h: u64,
    w: u64,
    n: usize,
    len: usize,
}

impl WordStream {
    #[inline]
    fn push(&mut self, b: u8) {
        self.w |= u64::from(b) << (8 * self.n);
        self.n += 1;
        self.len += 1;
        if self.n == 8 {
            self.h = word_block(self.h, self.w);
            (self.w, self.n) = (0, 0);
        }
    }
    #[inline]
    fn push_char(&mut self, l: char) {
        let mut buf = [0u8; 4];
        for &b in l.encode_utf8(&mut buf).as_bytes() {
            self.push(b);
        }
    }
}

/// The id of a word: a 64-bit hash of the UTF-8 bytes of its lowercased characters, taken in
/// little-endian blocks of eight (the last one padded with zero bytes, which no word has), and
/// their number. A collision (about 2^-64 per pair of distinct words) could only merge two words.
pub(super) fn word_id(word: &str) -> u64 {
    if word.bytes().all(|b| b.is_ascii_alphanumeric()) {
        return ascii_word_id(word.as_bytes());
    }
    let mut s = WordStream { h: WORD_SEED, w: 0, n: 0, len: 0 };
    for c in word.chars() {
        if c.is_ascii() {
            s.push(c.to_ascii_lowercase() as u8);
        } else if let Some(l) = latin1_letter(c) {
            // U+00C0..=U+00FF in UTF-8: 0xC3, then 0x80 | the low six bits.
            s.push(0xC3);
            s.push(0x80 | (l as u32 & 0x3F) as u8);
        } else {
            c.to_lowercase().for_each(|l| s.push_char(l));
        }
    }
    if s.n > 0 {
        s.h = word_block(s.h, s.w);
    }
    word_finish(s.h, s.len)
}

/// Where [`scan_hypothesis`] writes where a text's words start and end (spare entries past
/// them, written and not counted: one on the eight-byte path, up to six on the sixteen-byte one).
#[derive(Debug, Default, Clone)]
pub(super) struct WordSpans {
    edges: Vec<u32>,
}

/// Every byte's high bit.
const HIGH: u64 = 0x8080_8080_8080_8080;
/// Every byte's low bit.
const LOW: u64 = 0x0101_0101_0101_0101;

/// The high bit of each byte of a block of ASCII bytes at least `n` (at most 0x80); `xh` is
/// the block with every high bit set, so no subtraction borrows across bytes.
#[inline]
fn at_least(xh: u64, n: u64) -> u64 {
    xh.wrapping_sub(LOW * n) & HIGH
}

/// The number of bytes whose high bit is set in `m` (only high bits set).
#[inline]
fn count_high(m: u64) -> usize {
    ((m >> 7).wrapping_mul(LOW) >> 56) as usize
}

/// Masks (the high bit of each byte) of a block of eight ASCII bytes: non-space
/// ([`crate::text::is_space`] false), letter or digit, letter.
#[inline]
fn ascii_block_masks(x: u64) -> (u64, u64, u64) {
    let xh = x | HIGH;
    // White space: 0x09..=0x0D and 0x1C..=0x20.
    let space = (at_least(xh, 0x09) & !at_least(xh, 0x0E)) | (at_least(xh, 0x1C) & !at_least(xh, 0x21));
    let digit = at_least(xh, 0x30) & !at_least(xh, 0x3A);
    // Letters: with bit 0x20 set, 0x61..=0x7A (no other ASCII byte lands there).
    let lh = xh | (LOW * 0x20);
    let letter = at_least(lh, 0x61) & !at_least(lh, 0x7B);
    (HIGH & !space, digit | letter, letter)
}

/// The low `k` bytes of a block set, by `k` (0..=8).
const BYTE_MASKS: [u64; 9] = [0, 0xFF, 0xFFFF, 0xFF_FFFF, 0xFFFF_FFFF, 0xFF_FFFF_FFFF, 0xFFFF_FFFF_FFFF, 0xFF_FFFF_FFFF_FFFF, u64::MAX];

/// The id ([`word_id`]) of the word `hyp[start..end]` and whether it has a letter: read eight
/// bytes at a time, the last block read from the text around it and masked, not copied, when
/// its lowercase's UTF-8 is its own bytes with the ASCII letters lowercased: a word of ASCII
/// letters and digits, or any word when `latin_lower` (the text's characters outside ASCII are
/// all lowercase Latin-1 letters, their own lowercase, whose first byte 0xC3 has bit 0x40);
/// other words through [`word_id`].
#[inline(always)]
fn word_at(hyp: &str, start: usize, end: usize, latin_lower: bool) -> (u64, bool) {
    const LETTER: u64 = 0x4040_4040_4040_4040;
    let text = hyp.as_bytes();
    let len = end - start;
    // Most words: at most sixteen bytes with sixteen readable from their start; both blocks
    // read and masked, the second one's hash kept only when the word reaches into it.
    if len <= 16 && start + 16 <= text.len() {
        let a = load8(text, start) & BYTE_MASKS[len.min(8)];
        let b = load8(text, start + 8) & BYTE_MASKS[len.saturating_sub(8)];
        let seen = a | b;
        if seen & HIGH == 0 || latin_lower {
            let h1 = word_block(WORD_SEED, lower_block(a));
            let h2 = word_block(h1, lower_block(b));
            return (word_finish(if len > 8 { h2 } else { h1 }, len), seen & LETTER != 0);
        }
        let word = &hyp[start..end];
        return (word_id(word), word.chars().any(char::is_alphabetic));
    }
    let mut h = WORD_SEED;
    let mut seen = 0u64;
    let mut i = start;
    while i + 8 <= end {
        let w = load8(text, i);
        seen |= w;
        h = word_block(h, lower_block(w));
        i += 8;
    }
    let rest = end - i;
    if rest > 0 {
        let w = if i + 8 <= text.len() {
            load8(text, i) & (u64::MAX >> (8 * (8 - rest)))
        } else if end >= 8 {
            load8(text, end - 8) >> (8 * (8 - rest))
        } else {
            text[i..end].iter().rev().fold(0u64, |w, &b| (w << 8) | u64::from(b))
        };
        seen |= w;
        h = word_block(h, lower_block(w));
    }
    if seen & HIGH != 0 && !latin_lower {
        let word = &hyp[start..end];
        return (word_id(word), word.chars().any(char::is_alphabetic));
    }
    (word_finish(h, end - start), seen & LETTER != 0)
}

/// One pass over `hyp`: the [`HypScan`] counts against the source's `presence` set and, when
/// given, the `vocab`; its words into `ids` exactly as [`super::word_ids`] gives them.
///
/// Two loops. The first reads eight ASCII bytes at a time: their counts are bit counts of
/// masks ([`ascii_block_masks`]), their eight pair probes and word edges arithmetic with no
/// branch on what the bytes are (an edge is written at every byte and counted when it is one);
/// other characters, and ASCII bytes next to them, take a slower path. The second hashes the
/// words between the edges ([`word_at`]) and looks them up in the vocabulary.
///
/// On x86-64 processors with SSSE3, POPCNT, BMI1, BMI2 and LZCNT (checked at run time) the
/// first loop reads sixteen bytes at a time instead ([`simd`]), the same counts, probes and
/// edges.
pub(super) fn scan_hypothesis(hyp: &str, scripts: &[Script], presence: &PresenceSet, vocab: Option<&Vocabulary>, ids: &mut Vec<u64>, spans: &mut WordSpans) -> HypScan {
    #[cfg(target_arch = "x86_64")]
    if simd::available() {
        // SAFETY: the processor has the features `scan_simd` is compiled for.
        return unsafe { scan_simd(hyp, scripts, presence, vocab, ids, spans) };
    }
    scan_with::<false>(hyp, scripts, presence, vocab, ids, spans)
}

/// Which path [`scan_hypothesis`] takes on this processor: "sixteen-byte" or "eight-byte"
/// (what `mtgauge bench` reports beside its figures).
pub fn scan_path() -> &'static str {
    #[cfg(target_arch = "x86_64")]
    if simd::available() {
        return "sixteen-byte";
    }
    "eight-byte"
}

/// [`scan_hypothesis`] on the eight-byte path whatever the processor (what tests compare the
/// sixteen-byte path with).
#[cfg(test)]
pub(super) fn scan_hypothesis_portable(hyp: &str, scripts: &[Script], presence: &PresenceSet, vocab: Option<&Vocabulary>, ids: &mut Vec<u64>, spans: &mut WordSpans) -> HypScan {
    scan_with::<false>(hyp, scripts, presence, vocab, ids, spans)
}

/// [`scan_with`] compiled for SSSE3, POPCNT, BMI1, BMI2 and LZCNT (the last three: bit scans
/// and shifts by a variable in one instruction each), its sixteen-byte path on.
///
/// # Safety
/// The processor must have SSSE3, POPCNT, BMI1, BMI2 and LZCNT ([`simd::available`]).
#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "ssse3,popcnt,bmi1,bmi2,lzcnt")]
unsafe fn scan_simd(hyp: &str, scripts: &[Script], presence: &PresenceSet, vocab: Option<&Vocabulary>, ids: &mut Vec<u64>, spans: &mut WordSpans) -> HypScan {
    scan_with::<true>(hyp, scripts, presence, vocab, ids, spans)
}

/// The body of [`scan_hypothesis`]; `SIMD` (only in [`scan_simd`]) turns the sixteen-byte path on.
// The last edge's `open ^= 1` is not read after it.
#[allow(unused_assignments)]
#[inline(always)]
fn scan_with<const SIMD: bool>(hyp: &str, scripts: &[Script], presence: &PresenceSet, vocab: Option<&Vocabulary>, ids: &mut Vec<u64>, spans: &mut WordSpans) -> HypScan {
    let latin = usize::from(scripts.contains(&Script::Latin));
    let bytes = hyp.as_bytes();
    let cap = bytes.len() + 9;
    if spans.edges.len() < cap {
        spans.edges.resize(cap, 0);
    }
    let edges = &mut spans.edges[..cap];
    // The presence set with zero rows after it: the pair (none, c) reads row 32 (64 rows: an
    // index masked to six bits is in bounds).
    let mut set = [0u32; 64];
    set[..32].copy_from_slice(presence);
    let (mut chars, mut alnum_lower, mut letters, mut expected, mut extra_lower, mut ascii_letters) = (0usize, 0usize, 0usize, 0usize, 0usize, 0usize);
    let mut hits = 0u64;
    // The previous non-space character's class (32: none); whether a word is open; edges.
    let (mut prev, mut open, mut ned) = (32u32, 0u32, 0usize);
    // Whether every character outside ASCII so far is a lowercase Latin-1 letter or a plain
    // symbol (no word's bytes then need lowercasing but its ASCII letters).
    let mut latin_lower = true;
    macro_rules! edge_if {
        ($cond:expr, $at:expr) => {
            if $cond {
                edges[ned] = $at as u32;
                ned += 1;
                open ^= 1;
            }
        };
    }
    macro_rules! probe {
        ($cl:expr) => {{
            hits += u64::from((set[prev as usize] >> $cl) & 1);
            prev = $cl;
        }};
    }
    #[cfg(target_arch = "x86_64")]
    // SAFETY: with SIMD on, this runs in `scan_simd`, whose features the tables need.
    let tables = SIMD.then(|| unsafe { simd::Tables::of(&set) });
    let mut i = 0usize;
    while i < bytes.len() {
        #[cfg(target_arch = "x86_64")]
        if let Some(tables) = &tables {
            // SAFETY: i < bytes.len() (the loop's condition); the features as for the tables.
            let c = unsafe { simd::chunk(bytes, i, tables) };
            let k = c.ascii;
            if k > 0 {
                // The first k bytes (ASCII): their masks, bit j for byte i + j.
                let valid = (1u32 << k) - 1;
                let (solid, alnum, letter) = (c.solid & valid, c.alnum & valid, c.letter & valid);
                chars += solid.count_ones() as usize;
                alnum_lower += alnum.count_ones() as usize;
                ascii_letters += letter.count_ones() as usize;
                // A non-space byte pairs with the last non-space one before it: for the chunk's
                // first, the one `prev` holds; for the others, the one just before or, past one
                // white-space byte, the one before that (both probed in the chunk); past more
                // white space, found here.
                if solid != 0 {
                    let first = solid & solid.wrapping_neg();
                    hits += u64::from((set[prev as usize & 63] >> (bytes[i + first.trailing_zeros() as usize] & CLASS)) & 1);
                    let rest = solid & !first;
                    hits += u64::from((c.pairs & rest & ((solid << 1) | (solid << 2))).count_ones());
                    let mut far = rest & !(solid << 1) & !(solid << 2);
                    while far != 0 {
                        let j = far.trailing_zeros() as usize;
                        let below = solid & ((1u32 << j) - 1);
                        let p = bytes[i + 31 - below.leading_zeros() as usize] & CLASS;
                        hits += u64::from((set[usize::from(p)] >> (bytes[i + j] & CLASS)) & 1);
                        far &= far - 1;
                    }
                    prev = u32::from(bytes[i + 31 - solid.leading_zeros() as usize] & CLASS);
                }
                // Word edges where a letter or digit follows another byte or the reverse: six
                // written without a branch, each to its own place (edges past the last are
                // written and not counted; at most i + 1 edges lie before byte i, so six more
                // fit in the text's length plus nine), the rest, rare, in a loop.
                let mut t = (alnum ^ ((alnum << 1) | open)) & valid;
                let n = t.count_ones() as usize;
                let out = &mut edges[ned..ned + 6];
                for e in out.iter_mut() {
                    *e = (i + (t.trailing_zeros() as usize & 31)) as u32;
                    t &= t.wrapping_sub(1);
                }
                ned += n.min(6);
                while t != 0 {
                    edges[ned] = (i + t.trailing_zeros() as usize) as u32;
                    ned += 1;
                    t &= t - 1;
                }
                open = (alnum >> (k - 1)) & 1;
                i += k;
                continue;
            }
        }
        if i + 8 <= bytes.len() {
            let x = load8(bytes, i);
            if x & HIGH == 0 {
                let (solid, alnum, letter) = ascii_block_masks(x);
                chars += count_high(solid);
                alnum_lower += count_high(alnum);
                ascii_letters += count_high(letter);
                for j in 0..8 {
                    let cl = ((x >> (8 * j)) & 31) as u32;
                    let on = ((solid >> (8 * j + 7)) & 1) as u32;
                    hits += u64::from((set[prev as usize] >> cl) & on);
                    prev = if on != 0 { cl } else { prev };
                }
                // Bit j: byte j is a letter or digit (the high bits gathered into one byte).
                let m = ((alnum >> 7).wrapping_mul(0x0102_0408_1020_4080) >> 56) as u32;
                let t = m ^ ((m << 1) | open);
                for j in 0..8 {
                    edges[ned] = (i + j) as u32;
                    ned += ((t >> j) & 1) as usize;
                }
                open = (m >> 7) & 1;
                i += 8;
                continue;
            }
        }
        let b = bytes[i];
        if b < 0x80 {
            let e = ASCII[b as usize];
            let an = u32::from(e & ALNUM != 0);
            if e & SPACE == 0 {
                chars += 1;
                probe!(u32::from(e & CLASS));
            }
            alnum_lower += an as usize;
            ascii_letters += usize::from(e & ALPHA != 0);
            edge_if!(an != open, i);
            i += 1;
            continue;
        }
        let Some(c) = hyp[i..].chars().next() else { break };
        let len = c.len_utf8();
        if let Some(l) = latin1_letter(c) {
            chars += 1;
            probe!(class_of(l));
            alnum_lower += 1;
            letters += 1;
            expected += latin;
            latin_lower &= l == c;
            edge_if!(open == 0, i);
        } else if plain_symbol(c) {
            chars += 1;
            probe!(class_of(c));
            edge_if!(open != 0, i);
        } else {
            latin_lower = false;
            let space = is_space(c);
            let an = c.is_alphanumeric();
            if !space {
                chars += 1;
                for l in c.to_lowercase() {
                    extra_lower += 1;
                    alnum_lower += usize::from(an);
                    probe!(class_of(l));
                }
                extra_lower -= 1;
            }
            if let Some(sc) = script_of(c) {
                letters += 1;
                expected += usize::from(scripts.contains(&sc));
            }
            let cjk = is_cjk(c);
            if cjk || space || !is_word_char(c) {
                edge_if!(open != 0, i);
                if cjk && c.is_alphabetic() {
                    edge_if!(true, i);
                    edge_if!(true, i + len);
                }
            } else {
                edge_if!(open == 0, i);
            }
        }
        i += len;
    }
    edge_if!(open != 0, bytes.len());
    let (mut lettered, mut known) = (0usize, 0usize);
    ids.clear();
    for w in edges[..ned].chunks_exact(2) {
        let (id, letter) = word_at(hyp, w[0] as usize, w[1] as usize, latin_lower);
        ids.push(id);
        // No branch on the word: a word without a letter is looked up and not counted.
        lettered += usize::from(letter);
        known += usize::from(letter) & usize::from(vocab.is_some_and(|v| v.contains(id)));
    }
    HypScan {
        chars: chars as u64,
        lower: chars + extra_lower,
        alnum: alnum_lower > 0,
        alnum_lower,
        letters: ascii_letters + letters,
        expected: ascii_letters * latin + expected,
        hits,
        lettered,
        known,
    }
}

/// The sixteen-byte path of [`scan_hypothesis`] (x86-64, SSSE3, POPCNT, BMI1, BMI2 and LZCNT): the masks of
/// sixteen bytes by byte compares, and their fifteen pairs of adjacent bytes probed in the
/// presence set by byte shuffles.
#[cfg(target_arch = "x86_64")]
mod simd {
    use std::arch::x86_64::*;

    /// Whether the processor has what [`super::scan_simd`] is compiled for (std caches the
    /// answer).
    #[inline]
    pub(super) fn available() -> bool {
        is_x86_feature_detected!("ssse3") && is_x86_feature_detected!("popcnt") && is_x86_feature_detected!("bmi1") && is_x86_feature_detected!("bmi2") && is_x86_feature_detected!("lzcnt")
    }

    /// The presence set's first 32 rows as eight tables of sixteen bytes: the bit of the pair
    /// (a, b) is bit b % 8 of byte 4a + b / 8 (rows are little-endian u32), in table
    /// (4a + b / 8) / 16.
    pub(super) struct Tables([__m128i; 8]);

    impl Tables {
        /// # Safety
        /// SSSE3 (see [`available`]).
        #[inline(always)]
        pub(super) unsafe fn of(set: &[u32; 64]) -> Tables {
            let p = set.as_ptr();
            // SAFETY: rows 0..32 are 128 bytes of `set`; unaligned loads.
            unsafe {
                Tables([
                    _mm_loadu_si128(p.cast()),
                    _mm_loadu_si128(p.add(4).cast()),
                    _mm_loadu_si128(p.add(8).cast()),
                    _mm_loadu_si128(p.add(12).cast()),
                    _mm_loadu_si128(p.add(16).cast()),
                    _mm_loadu_si128(p.add(20).cast()),
                    _mm_loadu_si128(p.add(24).cast()),
                    _mm_loadu_si128(p.add(28).cast()),
                ])
            }
        }
    }

    /// What [`chunk`] finds in sixteen bytes: bit j of each mask for byte j.
    pub(super) struct Chunk {
        /// Leading bytes that are ASCII (0..=16); the masks hold only for those.
        pub ascii: usize,
        /// Not white space ([`crate::text::is_space`]).
        pub solid: u32,
        /// ASCII letters and digits.
        pub alnum: u32,
        /// ASCII letters.
        pub letter: u32,
        /// Bit j (j >= 1): the pair (class of byte j - 1, or of byte j - 2 when byte j - 1 is
        /// white space; class of byte j) is in the set.
        pub pairs: u32,
    }

    /// The masks of the bytes of `bytes` from `i`, at most sixteen (`ascii` counts only bytes
    /// before the end): the last chunk of a text of at least sixteen bytes is its last sixteen
    /// bytes shifted down, zero bytes shifted in; a shorter text's is read from a copy.
    ///
    /// # Safety
    /// SSSE3 (see [`available`]); `i < bytes.len()`.
    #[inline(always)]
    pub(super) unsafe fn chunk(bytes: &[u8], i: usize, t: &Tables) -> Chunk {
        debug_assert!(i < bytes.len());
        let len = bytes.len();
        // SAFETY: the loads read sixteen bytes of `bytes` (or of the copy); SSSE3.
        unsafe {
            let x = if i + 16 <= len {
                _mm_loadu_si128(bytes.as_ptr().add(i).cast())
            } else if len >= 16 {
                let d = (i + 16 - len) as i8;
                let at = _mm_add_epi8(_mm_setr_epi8(0, 1, 2, 3, 4, 5, 6, 7, 8, 9, 10, 11, 12, 13, 14, 15), _mm_set1_epi8(d));
                // Indices past 15 get their high bit set: a zero byte.
                let at = _mm_or_si128(at, _mm_cmpgt_epi8(at, _mm_set1_epi8(15)));
                _mm_shuffle_epi8(_mm_loadu_si128(bytes.as_ptr().add(len - 16).cast()), at)
            } else {
                let mut copy = [0u8; 16];
                copy[..len - i].copy_from_slice(&bytes[i..]);
                _mm_loadu_si128(copy.as_ptr().cast())
            };
            let c = chunk_of(x, t);
            Chunk { ascii: c.ascii.min(len - i), ..c }
        }
    }

    /// [`chunk`] of the sixteen bytes `x`.
    ///
    /// # Safety
    /// SSSE3 (see [`available`]).
    #[inline(always)]
    unsafe fn chunk_of(x: __m128i, t: &Tables) -> Chunk {
        // SAFETY: SSSE3, the caller's promise.
        unsafe {
            // (Macros, not closures: a closure would not get the caller's target features.)
            macro_rules! mask {
                ($v:expr) => {
                    _mm_movemask_epi8($v) as u32
                };
            }
            // Signed byte compares: bytes from 0x80 are negative and fall in no range (they
            // are past `ascii` anyway).
            macro_rules! within {
                ($v:expr, $lo:expr, $hi:expr) => {
                    _mm_and_si128(_mm_cmpgt_epi8($v, _mm_set1_epi8($lo - 1)), _mm_cmplt_epi8($v, _mm_set1_epi8($hi + 1)))
                };
            }
            let ascii = (mask!(x) | 0x1_0000).trailing_zeros() as usize;
            let space = _mm_or_si128(within!(x, 0x09, 0x0D), within!(x, 0x1C, 0x20));
            let digit = within!(x, 0x30, 0x39);
            // Letters: with bit 0x20 set, 0x61..=0x7A (no other ASCII byte lands there).
            let lx = _mm_or_si128(x, _mm_set1_epi8(0x20));
            let letter = within!(lx, 0x61, 0x7A);
            // The pair probes: byte index 4 * previous class + class / 8 (below 128; 16-bit
            // shifts, the bits they carry across bytes masked off), its table by the top three
            // bits, its byte by the low four; then bit class % 8 of that byte.
            let cls = _mm_and_si128(x, _mm_set1_epi8(31));
            // The previous byte's class, or the one before it when the previous byte is white space.
            let after_space = _mm_slli_si128::<1>(space);
            let prev = _mm_or_si128(_mm_andnot_si128(after_space, _mm_slli_si128::<1>(cls)), _mm_and_si128(after_space, _mm_slli_si128::<2>(cls)));
            let index = _mm_or_si128(_mm_slli_epi16::<2>(prev), _mm_and_si128(_mm_srli_epi16::<3>(cls), _mm_set1_epi8(3)));
            let low = _mm_and_si128(index, _mm_set1_epi8(15));
            let high = _mm_and_si128(_mm_srli_epi16::<4>(index), _mm_set1_epi8(7));
            let mut row = _mm_setzero_si128();
            for (k, table) in t.0.iter().enumerate() {
                let here = _mm_cmpeq_epi8(high, _mm_set1_epi8(k as i8));
                row = _mm_or_si128(row, _mm_and_si128(_mm_shuffle_epi8(*table, low), here));
            }
            let bits = _mm_setr_epi8(1, 2, 4, 8, 16, 32, 64, -128, 1, 2, 4, 8, 16, 32, 64, -128);
            let bit = _mm_shuffle_epi8(bits, _mm_and_si128(cls, _mm_set1_epi8(7)));
            let pairs = mask!(_mm_cmpeq_epi8(_mm_and_si128(row, bit), bit));
            Chunk { ascii, solid: !mask!(space) & 0xFFFF, alnum: mask!(_mm_or_si128(digit, letter)), letter: mask!(letter), pairs }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn ascii_table_agrees_with_the_definitions() {
        for b in 0u8..128 {
            let c = b as char;
            let e = ASCII[b as usize];
            assert_eq!(e & SPACE != 0, is_space(c), "{b}");
            assert_eq!(e & ALNUM != 0, c.is_alphanumeric(), "{b}");
            assert_eq!(e & ALPHA != 0, script_of(c).is_some(), "{b}");
            assert_eq!(u32::from(e & CLASS), class_of(c.to_ascii_lowercase()), "{b}");
        }
    }

    #[test]
    #[cfg(target_pointer_width = "64")]
    fn source_facts_size() {
        // What README and the docs say a session keeps per segment with a source.
        assert_eq!(std::mem::size_of::<SourceFacts>(), 160);
    }

    #[test]
    fn block_masks_agree_with_the_table() {
        // Every ASCII byte at every position of a block, among other bytes.
        for b in 0u8..128 {
            for pos in 0..8 {
                let mut block = [b'a', b' ', b'7', b'.', b'Z', b'\t', 0x1F, b'_'];
                block[pos] = b;
                let (solid, alnum, letter) = ascii_block_masks(u64::from_le_bytes(block));
                for (j, &x) in block.iter().enumerate() {
                    let e = ASCII[x as usize];
                    let bit = |m: u64| (m >> (8 * j + 7)) & 1 == 1;
                    assert_eq!(bit(solid), e & SPACE == 0, "{x:#x} at {j}");
                    assert_eq!(bit(alnum), e & ALNUM != 0, "{x:#x} at {j}");
                    assert_eq!(bit(letter), e & ALPHA != 0, "{x:#x} at {j}");
                }
                assert_eq!(count_high(solid), block.iter().filter(|&&x| ASCII[x as usize] & SPACE == 0).count());
                let m = ((alnum >> 7).wrapping_mul(0x0102_0408_1020_4080) >> 56) as u32;
                for (j, &x) in block.iter().enumerate() {
                    assert_eq!((m >> j) & 1 == 1, x.is_ascii_alphanumeric(), "{x:#x} at {j}");
                }
            }
        }
    }

    #[test]
    fn plain_symbols_agree_with_unicode() {
        let mut n = 0;
        for u in 0x80u32..0x2100 {
            let Some(c) = char::from_u32(u) else { continue };
            if plain_symbol(c) {
                n += 1;
                assert!(!is_space(c) && !c.is_alphanumeric() && script_of(c).is_none() && !is_word_char(c) && !is_cjk(c), "{c:?}");
                assert_eq!(c.to_lowercase().collect::<Vec<_>>(), vec![c], "{c:?}");
            }
        }
        assert!(n > 100);
    }

    #[test]
    fn latin1_letters_agree_with_unicode() {
        for u in 0x80u32..0x100 {
            let c = char::from_u32(u).unwrap();
            match latin1_letter(c) {
                Some(l) => {
                    assert!(c.is_alphabetic() && c.is_alphanumeric() && is_word_char(c) && !is_cjk(c) && !is_space(c), "{c}");
                    assert_eq!(script_of(c), Some(Script::Latin), "{c}");
                    assert_eq!(c.to_lowercase().collect::<Vec<_>>(), vec![l], "{c}");
                }
                None => assert!(!(0xC0..=0xFF).contains(&u) || !c.is_alphabetic(), "{c}"),
            }
        }
    }
}
