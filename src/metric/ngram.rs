//! Exact n-gram counting by sorting, shared by BLEU (token ids), chrF (characters) and chrF++
//! (words).
//!
//! A sequence is stored followed by `max_order` padding items (`T::default()`, which must be the
//! smallest value of `T` and never a real item). Positions sorted by the `max_order` items that
//! start there are in lexicographic order of every shorter n-gram too, so one sort serves all
//! orders: for order n the positions whose n-gram is complete (no padding inside) form, in that
//! sorted order, contiguous groups of equal n-grams. Counting is then a linear merge; there is no
//! hashing and no allocation (buffers are reused by the caller).

use std::cmp::Ordering;

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

/// Largest order whose n-grams of `u32` ids are packed into one `u128` key.
pub const PACKED_ORDER: usize = 4;

/// The `PACKED_ORDER` ids starting at `p` as one key, first id in the highest bits. `seq` must
/// hold `PACKED_ORDER` items from `p` (padding zeros after the sequence). Keys sort like the
/// id slices they pack, and the n-gram of order n is `key >> (32 * (PACKED_ORDER - n))`.
#[inline]
pub fn pack4(seq: &[u32], p: usize) -> u128 {
    let s = &seq[p..p + PACKED_ORDER];
    (s[0] as u128) << 96 | (s[1] as u128) << 64 | (s[2] as u128) << 32 | s[3] as u128
}

/// [`clipped_matches`] for every order 1..=`tables.len()` (at most [`PACKED_ORDER`]) at once,
/// with the hypothesis given as its sorted packed keys (one per position, see [`pack4`]) and
/// `tables[n - 1]` listing the positions of the complete n-grams of `b`, sorted (as the clipping
/// tables do). `g` is scratch space. Writes `out[n - 1]`.
///
/// Each order is a multiset intersection by a branch-free merge: an equal pair counts once and
/// advances both sides, so a value present ca and cb times counts min(ca, cb). Incomplete
/// hypothesis n-grams stay in `a_keys`: they end in a zero id and so never equal a reference
/// n-gram.
pub fn clipped_matches_packed(a_keys: &[u128], b: &[u32], tables: &[&[u32]], g: &mut PackedScratch, out: &mut [u64]) {
    let orders = tables.len();
    assert!(orders <= PACKED_ORDER && out.len() >= orders);
    // Keys of each order in the narrowest integer that holds them (one id: u32, two: u64),
    // gathered first (independent loads that pipeline), then merged as plain arrays.
    if orders >= 1 {
        g.a1.clear();
        g.a1.extend(a_keys.iter().map(|&k| (k >> 96) as u32));
        g.b1.clear();
        g.b1.extend(tables[0].iter().map(|&p| b[p as usize]));
        out[0] = merge_count(&g.a1, &g.b1);
    }
    if orders >= 2 {
        g.a2.clear();
        g.a2.extend(a_keys.iter().map(|&k| (k >> 64) as u64));
        g.b2.clear();
        g.b2.extend(tables[1].iter().map(|&p| (b[p as usize] as u64) << 32 | b[p as usize + 1] as u64));
        out[1] = merge_count(&g.a2, &g.b2);
    }
    for n in 3..=orders {
        let drop = 32 * (PACKED_ORDER - n) as u32;
        g.a3.clear();
        g.a3.extend(a_keys.iter().map(|&k| k >> drop));
        g.b3.clear();
        g.b3.extend(tables[n - 1].iter().map(|&p| pack4(b, p as usize) >> drop));
        out[n - 1] = merge_count(&g.a3, &g.b3);
    }
}

/// Reusable buffers of [`clipped_matches_packed`].
#[derive(Default)]
pub struct PackedScratch {
    a1: Vec<u32>,
    b1: Vec<u32>,
    a2: Vec<u64>,
    b2: Vec<u64>,
    a3: Vec<u128>,
    b3: Vec<u128>,
}

/// Multiset intersection size of two sorted lists, branch-free.
#[inline]
fn merge_count<T: Ord + Copy>(a: &[T], b: &[T]) -> u64 {
    let (mut i, mut j, mut m) = (0usize, 0usize, 0u64);
    while i < a.len() && j < b.len() {
        let (x, y) = (a[i], b[j]);
        m += (x == y) as u64;
        i += (x <= y) as usize;
        j += (y <= x) as usize;
    }
    m
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

    proptest! {
        #[test]
        fn packed_merge_equals_hash_counting(a in proptest::collection::vec(1u32..6, 0..30),
                                             b in proptest::collection::vec(1u32..6, 0..30),
                                             orders in 1usize..=PACKED_ORDER) {
            let (pa, pb) = (padded(&a, PACKED_ORDER), padded(&b, PACKED_ORDER));
            let mut keys: Vec<u128> = (0..a.len()).map(|p| pack4(&pa, p)).collect();
            keys.sort_unstable();
            // The reference side lists complete n-grams only, sorted.
            let tables: Vec<Vec<u32>> = (1..=orders).map(|n| {
                let mut sb: Vec<u32> = (0..(b.len() + 1).saturating_sub(n) as u32).collect();
                sb.sort_by_key(|&p| pack4(&pb, p as usize) >> (32 * (PACKED_ORDER - n)));
                sb
            }).collect();
            let refs: Vec<&[u32]> = tables.iter().map(Vec::as_slice).collect();
            let mut gather = PackedScratch::default();
            let mut out = [0u64; PACKED_ORDER];
            clipped_matches_packed(&keys, &pb, &refs, &mut gather, &mut out);
            for n in 1..=orders {
                prop_assert_eq!(out[n - 1], naive(n, &a, &b));
            }
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
