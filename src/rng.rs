//! A tiny deterministic PRNG for demo data, generated corpora and seeded tests (no external
//! crate, identical output on every platform).

/// SplitMix64: a tiny, fast, fully deterministic 64-bit PRNG.
#[derive(Debug, Clone)]
pub struct SplitMix64 {
    state: u64,
}

impl SplitMix64 {
    /// Additive constant of the SplitMix64 sequence.
    const GAMMA: u64 = 0x9E37_79B9_7F4A_7C15;
    /// Number of low bits discarded to build a 53-bit float mantissa.
    const FLOAT_SHIFT: u32 = 11;
    /// 2^-53, scales a 53-bit integer into [0, 1).
    const FLOAT_SCALE: f64 = 1.0 / (1u64 << 53) as f64;

    /// A generator starting from `seed` (the same seed gives the same sequence everywhere).
    pub fn new(seed: u64) -> Self {
        Self { state: seed }
    }

    /// The next 64 random bits.
    pub fn next_u64(&mut self) -> u64 {
        self.state = self.state.wrapping_add(Self::GAMMA);
        let mut z = self.state;
        z = (z ^ (z >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
        z = (z ^ (z >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
        z ^ (z >> 31)
    }

    /// Uniform integer in `0..n` (`n > 0`), via the multiply-high method.
    pub fn below(&mut self, n: u64) -> u64 {
        debug_assert!(n > 0);
        ((u128::from(self.next_u64()) * u128::from(n)) >> 64) as u64
    }

    /// Uniform integer in the inclusive range `lo..=hi`.
    pub fn in_range(&mut self, (lo, hi): (u32, u32)) -> u32 {
        lo + self.below(u64::from(hi - lo) + 1) as u32
    }

    /// Uniform float in `[0, 1)`.
    pub fn next_f64(&mut self) -> f64 {
        (self.next_u64() >> Self::FLOAT_SHIFT) as f64 * Self::FLOAT_SCALE
    }

    /// True with probability `p`.
    pub fn chance(&mut self, p: f64) -> bool {
        self.next_f64() < p
    }

    /// Index of a uniformly chosen element of a slice of length `len` (`len > 0`).
    pub fn index(&mut self, len: usize) -> usize {
        self.below(len as u64) as usize
    }

    /// Uniformly chosen element of a non-empty slice.
    pub fn pick<'a, T>(&mut self, items: &'a [T]) -> &'a T {
        &items[self.index(items.len())]
    }
}
