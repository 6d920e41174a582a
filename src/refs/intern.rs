//! Token interner for the scoring hot path: byte strings to dense ids from 1.
//!
//! Open addressing with linear probing over a power-of-two table whose slots hold the id and
//! 32 bits of the hash, so a probe touches the key bytes only on a likely hit. Keys live in one
//! byte arena (no per-token allocation); lookups of unknown tokens return [`UNKNOWN`].

/// Id returned for a token that was never interned: never equal to an interned id.
pub const UNKNOWN: u32 = u32::MAX;
/// Largest number of distinct tokens (ids stay below [`UNKNOWN`]).
const MAX_TOKENS: usize = (u32::MAX - 1) as usize;

/// Largest lookup table [`Interner::clear`] keeps.
const KEEP_SLOTS: usize = 4096;

#[derive(Default)]
pub struct Interner {
    /// Key bytes of every token, in id order.
    arena: Vec<u8>,
    /// Start of each token's bytes in `arena`, indexed by id - 1, plus the end.
    starts: Vec<u32>,
    /// Slot: `hash32 << 32 | id`, 0 when empty.
    table: Vec<u64>,
}

impl Interner {
    /// Number of distinct tokens.
    pub fn len(&self) -> usize {
        self.starts.len().saturating_sub(1)
    }

    fn key(&self, id: u32) -> &[u8] {
        let i = id as usize - 1;
        &self.arena[self.starts[i] as usize..self.starts[i + 1] as usize]
    }

    /// Slot index and id of `tok`, or the empty slot where it would go (id 0).
    #[inline]
    fn probe(&self, tok: &[u8], h: u64) -> (usize, u32) {
        let mask = self.table.len() - 1;
        let tag = h >> 32;
        let mut i = h as usize & mask;
        loop {
            let e = self.table[i];
            if e == 0 {
                return (i, 0);
            }
            if e >> 32 == tag && eq_bytes(self.key(e as u32), tok) {
                return (i, e as u32);
            }
            i = (i + 1) & mask;
        }
    }

    /// The id of `tok`, interning it if new.
    pub fn intern(&mut self, tok: &[u8]) -> u32 {
        if self.table.len() < 2 * (self.len() + 1) {
            self.grow();
        }
        let h = hash_bytes(tok);
        let (slot, id) = self.probe(tok, h);
        if id != 0 {
            return id;
        }
        assert!(self.len() < MAX_TOKENS, "more than {MAX_TOKENS} distinct tokens");
        if self.starts.is_empty() {
            self.starts.push(0);
        }
        self.arena.extend_from_slice(tok);
        let end = u32::try_from(self.arena.len()).expect("token arena above 4 GiB");
        self.starts.push(end);
        let id = self.len() as u32;
        self.table[slot] = (h >> 32) << 32 | id as u64;
        id
    }

    /// The id of `tok`, or [`UNKNOWN`].
    #[inline]
    pub fn get(&self, tok: &[u8]) -> u32 {
        if self.table.is_empty() {
            return UNKNOWN;
        }
        match self.probe(tok, hash_bytes(tok)) {
            (_, 0) => UNKNOWN,
            (_, id) => id,
        }
    }

    fn grow(&mut self) {
        let cap = (self.table.len() * 2).max(64);
        let old = std::mem::replace(&mut self.table, vec![0; cap]);
        let mask = cap - 1;
        for e in old.into_iter().filter(|&e| e != 0) {
            let h = hash_bytes(self.key(e as u32));
            let mut i = h as usize & mask;
            while self.table[i] != 0 {
                i = (i + 1) & mask;
            }
            self.table[i] = e;
        }
    }

    /// Forget every token, keeping the buffers (a table grown past [`KEEP_SLOTS`] is let go,
    /// so that one large input does not make every later clearing slow).
    pub fn clear(&mut self) {
        self.arena.clear();
        self.starts.clear();
        if self.table.len() > KEEP_SLOTS {
            self.table = Vec::new();
        } else {
            self.table.fill(0);
        }
    }

    /// Release spare capacity once building is done.
    pub fn shrink_to_fit(&mut self) {
        self.arena.shrink_to_fit();
        self.starts.shrink_to_fit();
    }

    /// Heap bytes held.
    pub fn memory_bytes(&self) -> usize {
        self.arena.capacity() + self.starts.capacity() * 4 + self.table.capacity() * 8
    }
}

/// Byte equality without a library call for the short keys tokens are.
#[inline]
fn eq_bytes(a: &[u8], b: &[u8]) -> bool {
    if a.len() != b.len() {
        return false;
    }
    let (mut ac, mut bc) = (a.chunks_exact(8), b.chunks_exact(8));
    for (x, y) in (&mut ac).zip(&mut bc) {
        if x != y {
            return false;
        }
    }
    ac.remainder().iter().zip(bc.remainder()).all(|(x, y)| x == y)
}

/// A fast 64-bit hash of a byte string (multiply-rotate over 8-byte words; not for hostile
/// keys' sake but for speed: collisions only cost probe steps, never wrong ids).
#[inline]
fn hash_bytes(b: &[u8]) -> u64 {
    const K: u64 = 0x9E37_79B9_7F4A_7C15;
    let mut h = (b.len() as u64).wrapping_mul(K);
    let mut chunks = b.chunks_exact(8);
    for c in &mut chunks {
        let w = u64::from_le_bytes([c[0], c[1], c[2], c[3], c[4], c[5], c[6], c[7]]);
        h = (h.rotate_left(23) ^ w).wrapping_mul(K);
    }
    let rest = chunks.remainder();
    if !rest.is_empty() {
        let mut w = 0u64;
        for (i, &x) in rest.iter().enumerate() {
            w |= (x as u64) << (8 * i);
        }
        h = (h.rotate_left(23) ^ w).wrapping_mul(K);
    }
    // Final avalanche so that both the low bits (slot) and the high bits (tag) mix all input.
    h ^= h >> 32;
    h = h.wrapping_mul(0xD6E8_FEB8_6659_FD93);
    h ^ (h >> 29)
}

#[cfg(test)]
mod tests {
    use super::*;
    use proptest::prelude::*;
    use std::collections::HashMap;

    proptest! {
        #[test]
        fn same_ids_as_a_hash_map(words in proptest::collection::vec(proptest::collection::vec(any::<u8>(), 0..20), 0..300),
                                  probes in proptest::collection::vec(proptest::collection::vec(any::<u8>(), 0..20), 0..50)) {
            let mut ours = Interner::default();
            let mut theirs: HashMap<Vec<u8>, u32> = HashMap::new();
            for w in &words {
                let next = theirs.len() as u32 + 1;
                let want = *theirs.entry(w.clone()).or_insert(next);
                prop_assert_eq!(ours.intern(w), want);
            }
            prop_assert_eq!(ours.len(), theirs.len());
            for p in probes.iter().chain(&words) {
                prop_assert_eq!(ours.get(p), theirs.get(p).copied().unwrap_or(UNKNOWN));
            }
        }
    }

    #[test]
    fn empty_interner_knows_nothing() {
        let i = Interner::default();
        assert_eq!(i.get(b"ferry"), UNKNOWN);
        assert_eq!(i.get(b""), UNKNOWN);
        assert_eq!(i.len(), 0);
    }
}
