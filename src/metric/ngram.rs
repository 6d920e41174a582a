//! Exact n-gram counting, shared by BLEU (tokens), chrF (characters) and chrF++ (words). Three
//! ways, all computing, per order n, the sum over distinct n-grams of the smaller of two counts:
//!
//! - gram tables ([`GramBuilder`], [`Gram`]): the references of a segment precomputed once into
//!   small integer tables; a hypothesis is named item by item through a per-table hash and its
//!   n-grams matched by walking the table, with no sorting at scoring time (BLEU);
//! - packed keys ([`sorted_keys`], [`packed_matches`]): n-grams of small items packed into one
//!   `u64` / `u128` per position, both sides sorted and merged once (chrF, chrF++);
//! - sorted positions ([`sort_positions`], [`clipped_matches`]), for what fits neither: a
//!   sequence is stored followed by `max_order` padding items (`T::default()`, which must be
//!   the smallest value of `T` and never a real item). Positions sorted by the `max_order`
//!   items that start there are in lexicographic order of every shorter n-gram too, so one sort
//!   serves all orders: for order n the positions whose n-gram is complete (no padding inside)
//!   form, in that sorted order, contiguous groups of equal n-grams, counted by a linear merge.
//!
//! None allocates per item; buffers are reused by the caller.

use std::cmp::Ordering;
use std::hint::select_unpredictable;

/// Append `len` items' positions of `seq` to `out`, sorted by the `max_order` items starting at
/// each position. `seq` must hold at least `len + max_order` items (the tail is padding).
pub fn sort_positions<T: Ord>(seq: &[T], len: usize, max_order: usize, out: &mut Vec<u32>) {
    debug_assert!(seq.len() >= len + max_order);
    out.clear();
    out.extend(0..len as u32);
    out.sort_unstable_by(|&a, &b| {
        let (a, b) = (a as usize, b as usize);
        seq[a..a + max_order].cmp(&seq[b..b + max_order])
    });
}

/// True when the n-gram of order `n` at `pos` is complete (has no padding item).
#[inline]
pub fn complete<T: Ord + Default>(seq: &[T], pos: u32, n: usize) -> bool {
    seq[pos as usize + n - 1] != T::default()
}

/// Number of complete n-grams of order `n` in a sequence of `len` items.
#[inline]
pub fn ngram_count(len: usize, n: usize) -> u64 {
    (len + 1).saturating_sub(n) as u64
}

/// Sum over the distinct n-grams g of order `n` of `min(count_a(g), count_b(g))`, where
/// `a_sorted`/`b_sorted` are positions into `a`/`b` sorted as by [`sort_positions`] (for `b`, a
/// list that repeats a position k times counts that n-gram k times: the clipping tables of BLEU
/// use that to store a maximum count).
pub fn clipped_matches<T: Ord + Default>(n: usize, a: &[T], a_sorted: &[u32], b: &[T], b_sorted: &[u32]) -> u64 {
    let gram = |p: u32| p as usize..p as usize + n;
    let mut matches = 0u64;
    let mut i = 0;
    let mut j = 0;
    while i < a_sorted.len() {
        let pa = a_sorted[i];
        if !complete(a, pa, n) {
            i += 1;
            continue;
        }
        let ga = &a[gram(pa)];
        let mut count_a = 1u64;
        i += 1;
        while i < a_sorted.len() {
            let p = a_sorted[i];
            if !complete(a, p, n) {
                // Cannot fall inside a group of complete n-grams (see the module notes): skip.
                i += 1;
                continue;
            }
            if a[gram(p)] == *ga {
                count_a += 1;
                i += 1;
            } else {
                break;
            }
        }
        // Advance b to the first n-gram >= ga.
        let mut count_b = 0u64;
        while j < b_sorted.len() {
            let pb = b_sorted[j];
            if !complete(b, pb, n) {
                j += 1;
                continue;
            }
            match b[gram(pb)].cmp(ga) {
                Ordering::Less => j += 1,
                Ordering::Equal => {
                    count_b += 1;
                    j += 1;
                }
                Ordering::Greater => break,
            }
        }
        matches += count_a.min(count_b);
    }
    matches
}

// ---------------------------------------------------------------------------------------------
// Gram tables: n-gram counts of fixed sequences, precomputed once, matched by walking.
// ---------------------------------------------------------------------------------------------

/// Unsigned integer type the entries of a gram table are stored in: tables of short sequences
/// take one byte per entry. `MAX` is reserved (separator / no item).
pub trait Width: Copy + Eq + Default + Send + Sync + 'static {
    /// Largest value of the type.
    const MAX: usize;
    /// `v` (at most `MAX`) as this type.
    fn of(v: usize) -> Self;
    /// The value as an index.
    fn ix(self) -> usize;
    /// This type's decrement buffer in `s`.
    fn rem(s: &mut GramScratch) -> &mut Vec<Self>;
}

macro_rules! width {
    ($($t:ty => $f:ident),*) => {$(
        impl Width for $t {
            const MAX: usize = <$t>::MAX as usize;
            #[inline(always)]
            fn of(v: usize) -> Self {
                debug_assert!(v <= <Self as Width>::MAX);
                v as $t
            }
            #[inline(always)]
            fn ix(self) -> usize {
                self as usize
            }
            fn rem(s: &mut GramScratch) -> &mut Vec<Self> {
                &mut s.$f
            }
        }
    )*};
}
width!(u8 => rem8, u16 => rem16, u32 => rem32);

/// Reusable buffers of [`Gram::count`].
#[derive(Default)]
pub struct GramScratch {
    state: Vec<(u32, u32)>,
    rem8: Vec<u8>,
    rem16: Vec<u16>,
    rem32: Vec<u32>,
}

/// Where one gram table lives in the arenas it was built into, and its sizes.
#[derive(Debug, Clone, Copy, Default)]
pub struct GramHead {
    /// Start of the table in its entry arena.
    pub start: usize,
    /// Start of its item keys in the key arena.
    pub keys: u32,
    /// Positions (items plus one separator per sequence).
    pub positions: u32,
    /// Distinct items.
    pub items: u32,
    /// Lookup slots (at least [`home_slots`] of the item count, plus an empty one at the end).
    pub slots: u32,
}

/// Item keys are hashed into the lookup slots by this.
#[inline(always)]
fn slot_hash(key: u64) -> u64 {
    (key ^ (key >> 29)).wrapping_mul(0x9E37_79B9_7F4A_7C15)
}

/// Home slots of a table of `items` distinct items: a load of at most 1/3.
fn home_slots(items: usize) -> usize {
    3 * items + 1
}

/// The home slot of `key` among `home` slots.
#[inline(always)]
fn home(key: u64, home: usize) -> usize {
    (((slot_hash(key) >> 32) * home as u64) >> 32) as usize
}

/// Entries of a table of `positions` positions, `items` distinct items, for `order`.
fn table_len(positions: usize, slots: usize, items: usize, order: usize) -> usize {
    let p1 = positions + 1;
    positions + order + (order - 1) * p1 + order * p1 + slots + items + 1
}

/// Builds gram tables; keeps its buffers between tables.
///
/// A table describes sequences of item keys (`u64`). They are laid out one after the other,
/// each followed by a separator, at positions `0..P`; position `P` is the dead state `D`. Every
/// distinct n-gram (n <= order) is named by the position of its first occurrence. Entries, each
/// in `0..=P` or [`Width::MAX`]:
///
/// - `item[0..P + order]`: at each position the name of its item (its first position), or MAX at
///   separators and after the end;
/// - `next[n][0..=P]` for n in 1..order: the next occurrence of the n-gram at that position, or D;
/// - `count[n][0..=P]` for n in 1..=order: at the name of each n-gram, its largest count in any
///   one sequence (0 elsewhere and at D);
/// - a linear-probing slot table (slots of item index + 1, 0 empty) and the first
///   position of each distinct item after D (the name of an empty slot), to name the items of a
///   sequence being scored; the keys of the items are stored after a placeholder, likewise.
///
/// To extend an n-gram named q by an item named t, walk q, next[n][q], next[n][next[n][q]] ...
/// until `item[q' + n] == t`: occurrences are walked in position order, so the first such q' is
/// the first occurrence of the (n + 1)-gram, that is, its name.
#[derive(Default)]
pub struct GramBuilder {
    first: rustc_hash::FxHashMap<u64, u32>,
    pairs: rustc_hash::FxHashMap<(u32, u32), u32>,
    item: Vec<u32>,
    name: Vec<u32>,
    last: Vec<u32>,
    cnt: Vec<u32>,
    best: Vec<u32>,
    distinct: Vec<(u64, u32)>,
}

const NONE: u32 = u32::MAX;

impl GramBuilder {
    /// Positions of a table of `seqs` (what [`Width::MAX`] must exceed).
    pub fn positions<'a>(seqs: impl IntoIterator<Item = &'a [u64]>) -> usize {
        seqs.into_iter().map(|s| s.len() + 1).sum()
    }

    /// Append the table of `seqs` for orders 1..=`order` to `data` and its item keys to `keys`.
    /// `W::MAX` must exceed [`GramBuilder::positions`].
    pub fn build<W: Width>(&mut self, seqs: &[&[u64]], order: usize, data: &mut Vec<W>, keys: &mut Vec<u64>) -> GramHead {
        assert!(order >= 1);
        let p = Self::positions(seqs.iter().copied());
        assert!(p < W::MAX, "gram table too large for its width");
        let d = p;
        self.first.clear();
        self.distinct.clear();
        self.item.clear();
        for s in seqs {
            for &k in s.iter() {
                let pos = self.item.len() as u32;
                let name = *self.first.entry(k).or_insert_with(|| {
                    self.distinct.push((k, pos));
                    pos
                });
                self.item.push(name);
            }
            self.item.push(NONE);
        }
        let mut head = GramHead {
            start: data.len(),
            keys: u32::try_from(keys.len()).expect("more than 2^32 table keys"),
            positions: p as u32,
            items: self.distinct.len() as u32,
            slots: 0,
        };
        let w = |v: u32| if v == NONE { W::of(W::MAX) } else { W::of(v as usize) };
        data.extend(self.item.iter().map(|&v| w(v)));
        data.extend(std::iter::repeat_n(W::of(W::MAX), order));
        let next_at = data.len();
        data.resize(next_at + (order - 1) * (p + 1), W::of(d));
        let count_at = data.len();
        data.resize(count_at + order * (p + 1), W::of(0));

        self.name.clear();
        self.name.extend_from_slice(&self.item);
        self.cnt.clear();
        self.cnt.resize(p, 0);
        self.best.clear();
        self.best.resize(p, 0);
        self.last.clear();
        self.last.resize(p, NONE);
        for n in 1..=order {
            if n > 1 {
                // Names of order n from names of order n - 1 and the following item.
                self.pairs.clear();
                for q in 0..p {
                    let prev = self.name[q];
                    let next_item = if q + n - 1 < p { self.item[q + n - 1] } else { NONE };
                    self.name[q] = if prev == NONE || next_item == NONE {
                        NONE
                    } else {
                        *self.pairs.entry((prev, next_item)).or_insert(q as u32)
                    };
                }
            }
            // Largest count in one sequence.
            let mut start = 0;
            for s in seqs {
                let range = start..start + s.len();
                for q in range.clone() {
                    if self.name[q] != NONE {
                        self.cnt[self.name[q] as usize] += 1;
                    }
                }
                for q in range {
                    let g = self.name[q];
                    if g != NONE {
                        let g = g as usize;
                        self.best[g] = self.best[g].max(self.cnt[g]);
                        self.cnt[g] = 0;
                    }
                }
                start += s.len() + 1;
            }
            let counts = &mut data[count_at + (n - 1) * (p + 1)..count_at + n * (p + 1)];
            for (g, b) in self.best.iter_mut().enumerate() {
                if *b != 0 {
                    counts[g] = W::of(*b as usize);
                    *b = 0;
                }
            }
            // Chains of occurrences.
            if n < order {
                let next = &mut data[next_at + (n - 1) * (p + 1)..next_at + n * (p + 1)];
                for q in (0..p).rev() {
                    let g = self.name[q];
                    if g != NONE {
                        let l = &mut self.last[g as usize];
                        if *l != NONE {
                            next[q] = W::of(*l as usize);
                        }
                        *l = q as u32;
                    }
                }
                for q in 0..p {
                    let g = self.name[q];
                    if g != NONE {
                        self.last[g as usize] = NONE;
                    }
                }
            }
        }
        // Lookup slots, then the first position of each item.
        let slots_at = data.len();
        // Linear probing without wrapping around: the slots run on past the home slots as far
        // as needed, and end with an empty slot, where every probe stops.
        let nhome = home_slots(self.distinct.len());
        data.resize(slots_at + nhome + 1, W::of(0));
        for (k, &(key, _)) in self.distinct.iter().enumerate() {
            let mut i = slots_at + home(key, nhome);
            while data[i] != W::of(0) {
                i += 1;
            }
            data[i] = W::of(k + 1);
            if i + 1 == data.len() {
                data.push(W::of(0));
            }
        }
        head.slots = (data.len() - slots_at) as u32;
        data.push(W::of(d));
        data.extend(self.distinct.iter().map(|&(_, pos)| W::of(pos as usize)));
        keys.push(0);
        keys.extend(self.distinct.iter().map(|&(k, _)| k));
        debug_assert_eq!(data.len() - head.start, table_len(p, head.slots as usize, self.distinct.len(), order));
        head
    }
}

/// A built gram table, for scoring.
pub struct Gram<'a, W> {
    item: &'a [W],
    next: &'a [W],
    count: &'a [W],
    slots: &'a [W],
    first: &'a [W],
    keys: &'a [u64],
    positions: usize,
    order: usize,
    home: usize,
}

impl<'a, W: Width> Gram<'a, W> {
    /// The table `head` (built for `order`) in the arenas it was built into.
    #[inline]
    pub fn new(head: &GramHead, order: usize, data: &'a [W], keys: &'a [u64]) -> Self {
        let (p, m) = (head.positions as usize, head.items as usize);
        let p1 = p + 1;
        let data = &data[head.start..head.start + table_len(p, head.slots as usize, m, order)];
        let (item, rest) = data.split_at(p + order);
        let (next, rest) = rest.split_at((order - 1) * p1);
        let (count, rest) = rest.split_at(order * p1);
        let (slots, first) = rest.split_at(head.slots as usize);
        let keys = &keys[head.keys as usize..head.keys as usize + m + 1];
        Gram { item, next, count, slots, first, keys, positions: p, order, home: home_slots(m) }
    }

    /// The name (first position) of the item `key`, or the dead state when the table does not
    /// hold it.
    #[inline(always)]
    pub fn lookup(&self, key: u64) -> u32 {
        let mut i = home(key, self.home);
        // Entry 0 of `keys` and `first` stands for an empty slot: its name is the dead state.
        // The first two slots are read without a branch (a lookup nearly always ends there);
        // there is always a slot after the home slots.
        let (s0, s1) = (self.slots[i].ix(), self.slots[i + 1].ix());
        let (f0, f1) = (self.keys[s0] == key, self.keys[s1] == key);
        let found = select_unpredictable(f0, s0, select_unpredictable(f1, s1, 0));
        if std::hint::black_box(f0 | f1 | (s0 == 0) | (s1 == 0)) {
            return self.first[found].ix() as u32;
        }
        i += 2;
        loop {
            let s = self.slots[i].ix();
            if std::hint::black_box((self.keys[s] == key) | (s == 0)) {
                return self.first[s].ix() as u32;
            }
            i += 1;
        }
    }

    /// Clipped matches of orders 1..=order of a sequence given as its items' names (from
    /// [`Gram::lookup`]): writes `out[n - 1]` = sum over distinct n-grams g of the sequence of
    /// min(its count of g, the table's count of g).
    pub fn count(&self, names: &[u32], g: &mut GramScratch, out: &mut [u64]) {
        let (p1, d, len) = (self.positions + 1, self.positions, names.len());
        let item = self.item;
        let mut rem = std::mem::take(W::rem(g));
        rem.clear();
        rem.extend_from_slice(self.count);
        // Each n-gram occurrence takes one from the remaining count of its name, if any is left.
        let take = |r: &mut [W], q: usize| -> u64 {
            let v = r[q].ix();
            let hit = (v != 0) as usize;
            r[q] = W::of(v - hit);
            hit as u64
        };
        // Live n-grams (hypothesis position, name of the n-gram there), in position order: an
        // n-gram that is not in the table has no extension in it either.
        let live = &mut g.state;
        live.resize(len, (0, 0));
        let r = &mut rem[..p1];
        let (mut m, mut k) = (0u64, 0usize);
        for (pos, &q) in names.iter().enumerate() {
            m += take(r, q as usize);
            live[k] = (pos as u32, q);
            k += (q as usize != d) as usize;
        }
        out[0] = m;
        for n in 1..self.order {
            // The n-gram at len - n has no extension in the hypothesis.
            if k > 0 && live[k - 1].0 as usize + n >= len {
                k -= 1;
            }
            let r = &mut rem[n * p1..(n + 1) * p1];
            let next = &self.next[(n - 1) * p1..n * p1];
            let (mut m, mut kept) = (0u64, 0usize);
            for j in 0..k {
                let (pos, q) = live[j];
                let q = q as usize;
                let want = names[pos as usize + n] as usize;
                // The first two occurrences are tried without a branch; the dead state (never
                // extended) has an item that matches nothing and itself as its next.
                let alt = next[q].ix();
                let mut q2 = select_unpredictable(item[q + n].ix() == want, q, alt);
                // Only when q2 is live and not followed by `want` (rare): one branch.
                let ok = item[q2 + n].ix() == want;
                if std::hint::black_box((q2 != d) & !ok) {
                    q2 = next[q2].ix();
                    while q2 != d && item[q2 + n].ix() != want {
                        q2 = next[q2].ix();
                    }
                }
                m += take(r, q2);
                live[kept] = (pos, q2 as u32);
                kept += (q2 != d) as usize;
            }
            out[n] = m;
            k = kept;
        }
        *W::rem(g) = rem;
    }
}

// ---------------------------------------------------------------------------------------------
// Packed keys: n-grams of small items in one integer, counted by sorting both sides.
// ---------------------------------------------------------------------------------------------

/// An integer that packs several items (`u64` or `u128`).
pub trait Packed:
    Copy
    + Ord
    + Default
    + std::ops::Shl<u32, Output = Self>
    + std::ops::Shr<u32, Output = Self>
    + std::ops::BitOr<Output = Self>
    + std::ops::BitXor<Output = Self>
    + From<u32>
{
    /// Width in bits.
    const BITS: u32;
    /// The lowest bit.
    fn low_bit(self) -> u64;
    /// Leading zero bits.
    fn leading_zeros(self) -> u32;
}

impl Packed for u64 {
    const BITS: u32 = 64;
    #[inline(always)]
    fn low_bit(self) -> u64 {
        self & 1
    }
    #[inline(always)]
    fn leading_zeros(self) -> u32 {
        u64::leading_zeros(self)
    }
}

impl Packed for u128 {
    const BITS: u32 = 128;
    #[inline(always)]
    fn low_bit(self) -> u64 {
        (self & 1) as u64
    }
    #[inline(always)]
    fn leading_zeros(self) -> u32 {
        u128::leading_zeros(self)
    }
}

/// Bits per item (at most 32) when `order` items are packed into `K` with one bit to spare.
pub fn packed_bits<K: Packed>(order: usize) -> u32 {
    ((K::BITS - 1) / order as u32).min(32)
}

/// The padding item of the reference side (the hypothesis side pads with 0); items must lie
/// strictly between the two.
pub fn packed_ref_pad<K: Packed>(order: usize) -> u32 {
    ((1u64 << packed_bits::<K>(order)) - 1) as u32
}

/// Whether items up to `max` can be packed `order` to a `K` (see [`packed_ref_pad`]).
pub fn packed_fits<K: Packed>(order: usize, max: u32) -> bool {
    max < packed_ref_pad::<K>(order)
}

/// Into `out`, sorted: at each position of `items`, the `order` items from there (`pad` past the
/// end), first item in the highest bits. Keys sort like the item sequences they pack, so the
/// keys cut to their first n items (`key >> (bits * (order - n))`) come out sorted too.
pub fn sorted_keys<K: Packed>(items: &[u32], order: usize, pad: u32, out: &mut Vec<K>) {
    keys(items, order, pad, out);
    out.sort_unstable();
}

/// The keys of [`sorted_keys`] in position order.
fn keys<K: Packed>(items: &[u32], order: usize, pad: u32, out: &mut Vec<K>) {
    let b = packed_bits::<K>(order);
    let top = b * (order as u32 - 1);
    let mut key = (0..order).fold(K::default(), |k, _| (k << b) | K::from(pad));
    out.clear();
    out.resize(items.len(), K::default());
    for (o, &it) in out.iter_mut().zip(items).rev() {
        key = (K::from(it) << top) | (key >> b);
        *o = key;
    }
}

/// Positions of `items` sorted by the `order` items from each (past the end: above every
/// item), as the reference side of [`sorted_keys`] sorts them whatever the key type; `None`
/// when the items do not fit a `u128` key. For [`keys_in_order`].
pub fn key_order(items: &[u32], order: usize) -> Option<Vec<u32>> {
    let max = items.iter().copied().max().unwrap_or(0);
    if !packed_fits::<u128>(order, max) {
        return None;
    }
    let mut k: Vec<u128> = Vec::new();
    keys(items, order, packed_ref_pad::<u128>(order), &mut k);
    let mut pos: Vec<u32> = (0..items.len() as u32).collect();
    pos.sort_unstable_by_key(|&p| k[p as usize]);
    Some(pos)
}

/// [`sorted_keys`] of reference-side items (padded with [`packed_ref_pad`]) whose
/// [`key_order`] is known: the keys are put in that order instead of sorted. `tmp` is scratch.
pub fn keys_in_order<K: Packed, I: Copy + Into<usize>>(items: &[u32], order: usize, by: &[I], tmp: &mut Vec<K>, out: &mut Vec<K>) {
    debug_assert_eq!(items.len(), by.len());
    keys(items, order, packed_ref_pad::<K>(order), tmp);
    out.clear();
    out.extend(by.iter().map(|&p| tmp[p.into()]));
}

/// For every order n in 1..=`order`: `out[n - 1]` = sum over distinct n-grams g of
/// min(count of g in `hyp`, count of g in `reference`), with both sides given as
/// [`sorted_keys`] (the hypothesis padded with 0, the reference with [`packed_ref_pad`], so that
/// incomplete n-grams never match). `merged` is scratch space.
///
/// The two lists are merged once into one sorted list, each key tagged with its side in a spare
/// low bit; in it, for every order, equal n-grams form runs, and each run adds the smaller of
/// its two sides' counts.
pub fn packed_matches<K: Packed>(hyp: &[K], reference: &[K], order: usize, merged: &mut Vec<K>, out: &mut [u64]) {
    let b = packed_bits::<K>(order);
    merged.clear();
    merged.reserve(hyp.len() + reference.len());
    let (mut i, mut j) = (0, 0);
    while i < hyp.len() && j < reference.len() {
        let (x, y) = (hyp[i], reference[j]);
        let take_hyp = x <= y;
        merged.push(select_unpredictable(take_hyp, x << 1, (y << 1) | K::from(1)));
        i += take_hyp as usize;
        j += !take_hyp as usize;
    }
    merged.extend(hyp[i..].iter().map(|&x| x << 1));
    merged.extend(reference[j..].iter().map(|&y| (y << 1) | K::from(1)));
    if order <= LANES && merged.len() < i16::MAX as usize {
        run_counts_lanes(merged, order, b, out);
    } else {
        run_counts(merged, order, b, out);
    }
}

/// Orders counted side by side by [`run_counts_lanes`].
const LANES: usize = 8;

/// The run counting of [`packed_matches`], one order after the other.
fn run_counts<K: Packed>(merged: &[K], order: usize, b: u32, out: &mut [u64]) {
    for n in 1..=order {
        let shift = 1 + b * (order - n) as u32;
        let Some(&first) = merged.first() else {
            out[n - 1] = 0;
            continue;
        };
        let (mut m, mut in_hyp, mut in_ref, mut run) = (0u64, 0u64, 0u64, first >> shift);
        for &k in merged {
            let g = k >> shift;
            let new_run = g != run;
            m += select_unpredictable(new_run, in_hyp.min(in_ref), 0);
            in_hyp = select_unpredictable(new_run, 0, in_hyp);
            in_ref = select_unpredictable(new_run, 0, in_ref);
            let side = k.low_bit();
            in_hyp += 1 - side;
            in_ref += side;
            run = g;
        }
        out[n - 1] = m + in_hyp.min(in_ref);
    }
}

/// [`run_counts`] for up to [`LANES`] orders at once, in 16-bit lanes (`merged` shorter than
/// `i16::MAX`, so no count overflows). A run of order n ends where a key differs from the one
/// before in a bit at or above the first bit that order keeps.
fn run_counts_lanes<K: Packed>(merged: &[K], order: usize, b: u32, out: &mut [u64]) {
    // Lane n - 1: the lowest bit order n keeps (unused lanes: never a new run).
    let mut keep = [i16::MAX; LANES];
    for (n, k) in keep.iter_mut().enumerate().take(order) {
        *k = (1 + b * (order - 1 - n) as u32) as i16;
    }
    let (mut m, mut in_hyp, mut in_ref) = ([0i16; LANES], [0i16; LANES], [0i16; LANES]);
    let mut prev = merged.first().copied().unwrap_or_default();
    for &k in merged {
        // One past the highest bit where k differs from prev (0 when equal).
        let top = (K::BITS - (k ^ prev).leading_zeros()) as i16;
        let side = k.low_bit() as i16;
        for l in 0..LANES {
            // All ones where a run ends.
            let end = -((top > keep[l]) as i16);
            m[l] += in_hyp[l].min(in_ref[l]) & end;
            in_hyp[l] = (in_hyp[l] & !end) + (1 - side);
            in_ref[l] = (in_ref[l] & !end) + side;
        }
        prev = k;
    }
    for l in 0..order {
        out[l] = (m[l] + in_hyp[l].min(in_ref[l])) as u64;
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use proptest::prelude::*;
    use std::collections::HashMap;

    fn padded(v: &[u32], max: usize) -> Vec<u32> {
        let mut s = v.to_vec();
        s.extend(std::iter::repeat(0).take(max));
        s
    }

    fn naive(n: usize, a: &[u32], b: &[u32]) -> u64 {
        fn count(s: &[u32], n: usize) -> HashMap<&[u32], u64> {
            let mut m: HashMap<&[u32], u64> = HashMap::new();
            if s.len() >= n {
                for w in s.windows(n) {
                    *m.entry(w).or_default() += 1;
                }
            }
            m
        }
        let (ca, cb) = (count(a, n), count(b, n));
        ca.iter().map(|(g, &c)| c.min(*cb.get(g).unwrap_or(&0))).sum()
    }

    proptest! {
        #[test]
        fn merge_equals_hash_counting(a in proptest::collection::vec(1u32..6, 0..30),
                                      b in proptest::collection::vec(1u32..6, 0..30),
                                      max in 1usize..7) {
            let (pa, pb) = (padded(&a, max), padded(&b, max));
            let (mut sa, mut sb) = (Vec::new(), Vec::new());
            sort_positions(&pa, a.len(), max, &mut sa);
            sort_positions(&pb, b.len(), max, &mut sb);
            for n in 1..=max {
                prop_assert_eq!(clipped_matches(n, &pa, &sa, &pb, &sb), naive(n, &a, &b));
            }
        }
    }

    /// Sum over distinct n-grams of the hypothesis of min(its count, the largest count in any
    /// one reference), by hash maps.
    fn naive_clipped(n: usize, hyp: &[u64], refs: &[Vec<u64>]) -> u64 {
        fn count(s: &[u64], n: usize) -> HashMap<&[u64], u64> {
            let mut m: HashMap<&[u64], u64> = HashMap::new();
            if s.len() >= n {
                for w in s.windows(n) {
                    *m.entry(w).or_default() += 1;
                }
            }
            m
        }
        let rc: Vec<_> = refs.iter().map(|r| count(r, n)).collect();
        count(hyp, n).iter().map(|(g, &c)| c.min(rc.iter().map(|m| *m.get(g).unwrap_or(&0)).max().unwrap_or(0))).sum()
    }

    fn gram_counts<W: Width>(hyp: &[u64], refs: &[Vec<u64>], order: usize) -> Vec<u64> {
        // Two tables in the same arenas, to check that offsets are honoured.
        let mut b = GramBuilder::default();
        let (mut data, mut keys) = (Vec::<W>::new(), Vec::new());
        let other: Vec<&[u64]> = vec![&[9, 9, 8], &[]];
        b.build(&other, order, &mut data, &mut keys);
        let seqs: Vec<&[u64]> = refs.iter().map(Vec::as_slice).collect();
        let head = b.build(&seqs, order, &mut data, &mut keys);
        b.build(&other, order, &mut data, &mut keys);
        let g = Gram::new(&head, order, &data, &keys);
        let names: Vec<u32> = hyp.iter().map(|&k| g.lookup(k)).collect();
        let mut scratch = GramScratch::default();
        let mut out = vec![u64::MAX; order];
        g.count(&names, &mut scratch, &mut out);
        // Reusing the scratch gives the same counts.
        let mut again = vec![u64::MAX; order];
        g.count(&names, &mut scratch, &mut again);
        assert_eq!(out, again);
        out
    }

    proptest! {
        #[test]
        fn gram_table_equals_hash_counting(hyp in proptest::collection::vec(0u64..7, 0..40),
                                           refs in proptest::collection::vec(proptest::collection::vec(0u64..7, 0..40), 1..4),
                                           order in 1usize..=7,
                                           big_keys in any::<bool>()) {
            // Keys anywhere in u64 (the slot hash must not care).
            let f = |v: &u64| if big_keys { v.wrapping_mul(0x1234_5678_9ABC_DEF1) ^ (u64::MAX << 40) } else { *v };
            let hyp: Vec<u64> = hyp.iter().map(f).collect();
            let refs: Vec<Vec<u64>> = refs.iter().map(|r| r.iter().map(f).collect()).collect();
            let want: Vec<u64> = (1..=order).map(|n| naive_clipped(n, &hyp, &refs)).collect();
            prop_assert_eq!(&gram_counts::<u8>(&hyp, &refs, order), &want);
            prop_assert_eq!(&gram_counts::<u16>(&hyp, &refs, order), &want);
            prop_assert_eq!(&gram_counts::<u32>(&hyp, &refs, order), &want);
        }
    }

    #[test]
    fn gram_table_with_long_repeats() {
        // Long chains of one item, and a table needing more than a byte per entry.
        let r: Vec<u64> = (0..300).map(|i| if i % 7 == 0 { 2 } else { 1 }).collect();
        let hyp: Vec<u64> = (0..90).map(|i| if i % 5 == 0 { 2 } else { 1 }).collect();
        let refs = vec![r.clone(), r[..40].to_vec()];
        let want: Vec<u64> = (1..=4).map(|n| naive_clipped(n, &hyp, &refs)).collect();
        assert_eq!(gram_counts::<u16>(&hyp, &refs, 4), want);
        assert_eq!(gram_counts::<u32>(&hyp, &refs, 4), want);
    }

    fn packed_counts<K: Packed>(a: &[u32], b: &[u32], order: usize) -> Vec<u64> {
        let (mut ka, mut kb, mut merged) = (Vec::<K>::new(), Vec::<K>::new(), Vec::new());
        sorted_keys(a, order, 0, &mut ka);
        sorted_keys(b, order, packed_ref_pad::<K>(order), &mut kb);
        let mut out = vec![u64::MAX; order];
        packed_matches(&ka, &kb, order, &mut merged, &mut out);
        // Both ways of counting runs agree.
        let b = packed_bits::<K>(order);
        let mut one_by_one = vec![u64::MAX; order];
        run_counts(&merged, order, b, &mut one_by_one);
        assert_eq!(out, one_by_one);
        if order <= LANES {
            let mut lanes = vec![u64::MAX; order];
            run_counts_lanes(&merged, order, b, &mut lanes);
            assert_eq!(out, lanes);
        }
        out
    }

    proptest! {
        #[test]
        fn packed_keys_equal_hash_counting(a in proptest::collection::vec(1u32..6, 0..40),
                                           b in proptest::collection::vec(1u32..6, 0..40),
                                           order in 1usize..=10,
                                           high in any::<bool>()) {
            // Items near the top of the range as well as small ones.
            for k in 0..2 {
                if order > if k == 0 { 9 } else { 10 } {
                    continue;
                }
                let bits = if k == 0 { packed_bits::<u64>(order) } else { packed_bits::<u128>(order) };
                let top = ((1u64 << bits) - 7) as u32;
                let f = |v: &u32| if high { top + *v - 1 } else { *v };
                let (a, b): (Vec<u32>, Vec<u32>) = (a.iter().map(f).collect(), b.iter().map(f).collect());
                let (wa, wb): (Vec<u64>, Vec<u64>) = (a.iter().map(|&x| x as u64).collect(), b.iter().map(|&x| x as u64).collect());
                let want: Vec<u64> = (1..=order).map(|n| naive_clipped(n, &wa, &[wb.clone()])).collect();
                let got = if k == 0 { packed_counts::<u64>(&a, &b, order) } else { packed_counts::<u128>(&a, &b, order) };
                prop_assert_eq!(got, want);
            }
        }
    }

    proptest! {
        #[test]
        fn keys_in_key_order_are_sorted(items in proptest::collection::vec(1u32..5, 0..60), order in 1usize..=6) {
            let by = key_order(&items, order).unwrap();
            let (mut tmp, mut got, mut want) = (Vec::new(), Vec::new(), Vec::new());
            let by8: Vec<u16> = by.iter().map(|&p| p as u16).collect();
            keys_in_order::<u64, u16>(&items, order, &by8, &mut tmp, &mut got);
            sorted_keys::<u64>(&items, order, packed_ref_pad::<u64>(order), &mut want);
            prop_assert_eq!(&got, &want);
            let (mut tmp, mut got, mut want) = (Vec::new(), Vec::new(), Vec::new());
            keys_in_order::<u128, u16>(&items, order, &by8, &mut tmp, &mut got);
            sorted_keys::<u128>(&items, order, packed_ref_pad::<u128>(order), &mut want);
            prop_assert_eq!(&got, &want);
        }
    }

    #[test]
    fn counts() {
        assert_eq!(ngram_count(0, 1), 0);
        assert_eq!(ngram_count(3, 4), 0);
        assert_eq!(ngram_count(4, 4), 1);
        assert_eq!(ngram_count(25, 2), 24);
    }
}
