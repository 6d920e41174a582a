//! Bootstrap replicates for confidence intervals: the Poisson bootstrap over segments.
//!
//! The classic bootstrap (Efron & Tibshirani 1993) draws n segments with replacement and
//! recomputes the corpus score; each segment then appears k times with k ~ Binomial(n, 1/n).
//! The Poisson bootstrap (Hanley & MacGibbon 2006; Chamandy et al. 2012, "Estimating uncertainty
//! for massive data streams"; the same weights as Oza & Russell 2001's online bagging) gives each
//! segment an independent weight w ~ Poisson(1) per replicate instead, the limit of that
//! binomial. The weights need no knowledge of n, so each replicate is a running weighted sum of
//! the segments' integer sufficient statistics: it grows one segment at a time, adds up across
//! shards and replicas, and a window subtracts a segment that leaves it with the same weights.
//!
//! # Weights
//! The weight of a segment in replicate r (0-based) under a seed is a fixed function of the
//! segment's key (the reference-set segment id, as bytes), r and the seed, so every process,
//! session and pass gives a segment the same weights:
//!
//! 1. `k = mix64(fnv1a64(id))`: FNV-1a, 64 bits (offset basis 0xcbf29ce484222325, prime
//!    0x100000001b3), then [`mix64`] (the SplitMix64 output function) so that neighbouring ids
//!    ("41", "42") differ in every bit.
//! 2. `base = mix64(k ^ mix64(seed))`.
//! 3. Block b (replicates 4b..4b+3) uses `h_b = mix64(base + (b + 1) * 0x9E3779B97F4A7C15)`
//!    (mod 2^64): the (b+1)-th output of the SplitMix64 sequence started at `base`.
//! 4. Replicate 4b + j takes the 16 bits `(h_b >> 16 j) & 0xFFFF` as u and returns the Poisson(1)
//!    inverse CDF of (u + 1/2) / 2^16 on a 2^16 grid: the smallest w with u < T_w, where
//!    T_w = round(2^16 F(w)) and F is the Poisson(1) CDF ([`POISSON1_THRESHOLDS`]).
//!
//! One 64-bit hash thus gives [`WEIGHTS_PER_HASH`] weights. The 16-bit resolution sets each
//! probability to a multiple of 2^-16: P(w >= 8) = 2^-16 (exact: 1.0e-5) and weights above
//! [`MAX_WEIGHT`] = 8 never occur (exact P(w >= 9) = 1.1e-6). The grid's mean is 1 and its variance
//! 0.99997 (computed from the table in the tests).
//!
//! # Consequences
//! Replicate sums over any split of the segments add up to one pass over all of them, exactly
//! (integers). Two systems scored on the same reference set under the same seed get the same
//! weights per segment: their replicates are paired. A segment scored twice (a replayed probe
//! set) gets the same weights both times, so the bootstrap resamples segments, not passes.
//!
//! # Interval
//! The percentile interval (Efron & Tibshirani 1993, ch. 13) at level L over the R replicate
//! scores x_(1) <= ... <= x_(R): low = Q(a), high = Q(1 - a) with a = (1 - L) / 2 and
//! Q(p) = x_(ceil(p R)) (the inverse of the empirical distribution function; Hyndman & Fan 1996,
//! definition 1), the rank clamped to 1..=R. For R = 1000 and L = 0.95: x_(25) and x_(975).

use serde::Serialize;

use super::layout::Layout;
use super::scores::corpus_score;
use super::{CorpusStats, Metric, ScoreConfig, SegmentStats};

/// Replicates of an offline `score --interval` unless configured.
pub const OFFLINE_RESAMPLES: usize = 1000;
/// Replicates the daemon keeps per session unless configured.
pub const DAEMON_RESAMPLES: usize = 200;
/// Most replicates accepted (memory: replicates x fields x 8 bytes per shard).
pub const MAX_RESAMPLES: usize = 20_000;
/// Most replicates a daemon session may keep: it holds about ten copies of its sums (cumulative
/// and the window's checkpoints), 2.3 MB at this many for bleu + chrf.
pub const MAX_SESSION_RESAMPLES: usize = 1_000;
/// Seed of the replicate weights unless configured.
pub const DEFAULT_RESAMPLE_SEED: u64 = 1;
/// Interval level unless configured (common practice).
pub const DEFAULT_LEVEL: f64 = 0.95;
/// How the intervals are made, as written in outputs.
pub const METHOD: &str = "poisson-bootstrap-percentile";
/// Weights taken from one 64-bit hash.
pub const WEIGHTS_PER_HASH: usize = 4;
/// Bits of the hash per weight.
pub const WEIGHT_BITS: u32 = 16;
/// Largest weight the 16-bit grid gives.
pub const MAX_WEIGHT: u8 = 8;

/// `round(2^16 F(w))` for w = 0..=7, F the Poisson(1) CDF `e^-1 sum_{j<=w} 1/j!`; the tests
/// recompute them.
pub const POISSON1_THRESHOLDS: [u32; MAX_WEIGHT as usize] = [24109, 48219, 60273, 64292, 65296, 65497, 65531, 65535];

const FNV_OFFSET: u64 = 0xcbf2_9ce4_8422_2325;
const FNV_PRIME: u64 = 0x0000_0100_0000_01b3;
/// Increment of the SplitMix64 sequence (2^64 / golden ratio, odd).
const GAMMA: u64 = 0x9E37_79B9_7F4A_7C15;

/// The SplitMix64 output function (Steele, Lea & Flood 2014): a bijection of 64-bit words in
/// which every input bit affects every output bit.
#[inline]
pub fn mix64(mut z: u64) -> u64 {
    z = (z ^ (z >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
    z = (z ^ (z >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
    z ^ (z >> 31)
}

/// FNV-1a, 64 bits, of `bytes`.
pub fn fnv1a64(bytes: &[u8]) -> u64 {
    bytes.iter().fold(FNV_OFFSET, |h, &b| (h ^ u64::from(b)).wrapping_mul(FNV_PRIME))
}

/// The key of a segment id for [`fill_weights`].
pub fn segment_key(id: &[u8]) -> u64 {
    mix64(fnv1a64(id))
}

/// Poisson(1) inverse CDF of a 16-bit uniform `u` (see the module notes).
#[inline]
pub fn poisson1(u: u32) -> u8 {
    POISSON1_THRESHOLDS.iter().map(|&t| u8::from(u >= t)).sum()
}

/// The weights of the segment with key `key` in replicates `0..out.len()` under `seed`.
pub fn fill_weights(key: u64, seed: u64, out: &mut [u8]) {
    let base = mix64(key ^ mix64(seed));
    for (b, chunk) in out.chunks_mut(WEIGHTS_PER_HASH).enumerate() {
        let h = mix64(base.wrapping_add((b as u64 + 1).wrapping_mul(GAMMA)));
        for (j, w) in chunk.iter_mut().enumerate() {
            *w = poisson1(((h >> (WEIGHT_BITS * j as u32)) & 0xFFFF) as u32);
        }
    }
}

/// Ranks (1-based) of the percentile interval's bounds among `r` sorted replicates at `level`.
pub fn percentile_ranks(r: usize, level: f64) -> (usize, usize) {
    let a = (1.0 - level) / 2.0;
    // ceil(p R), with a margin for p R that is an integer up to rounding (0.025 * 1000).
    let rank = |p: f64| ((p * r as f64 - 1e-9).ceil() as usize).clamp(1, r.max(1));
    (rank(a), rank(1.0 - a))
}

/// The percentile interval of `scores` at `level` (sorts them); `None` when empty.
pub fn percentile_interval(scores: &mut [f64], level: f64) -> Option<(f64, f64)> {
    if scores.is_empty() {
        return None;
    }
    scores.sort_by(f64::total_cmp);
    let (lo, hi) = percentile_ranks(scores.len(), level);
    Some((scores[lo - 1], scores[hi - 1]))
}

/// Whether `level` is a valid interval level: strictly between 0 and 1.
pub fn valid_level(level: f64) -> bool {
    level > 0.0 && level < 1.0
}

/// A confidence interval of one score, as written in outputs.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct Interval {
    /// Confidence level, 0-1.
    pub level: f64,
    /// Lower bound (same scale as the score).
    pub low: f64,
    /// Upper bound.
    pub high: f64,
    /// Replicates behind it.
    pub resamples: usize,
    /// [`METHOD`].
    pub method: &'static str,
    /// Seed of the weights.
    pub seed: u64,
}

/// Why two replicate sums cannot be added.
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
#[error("replicate sums differ in configuration, replicate count or seed")]
pub struct ReplicateMismatch;

/// Per replicate, the weighted sums of the configured integer statistics (only the fields the
/// configuration uses, as the `recent` window keeps them) and the sum of the weights.
///
/// Stored field-major: the R sums of one field are contiguous, so adding a segment is, per
/// field the segment has non-zero, one pass of `sum[r] += value * weight[r]` over the
/// replicates (vectorised; fields that are zero, often the higher BLEU orders, cost nothing).
#[derive(Debug, Clone)]
pub struct Replicates {
    config: ScoreConfig,
    layout: Layout,
    seed: u64,
    resamples: usize,
    /// `layout.width() + 1` fields of `resamples` sums each; the last field is the summed weight
    /// (the replicate's segment count).
    sums: Vec<u64>,
    scratch: Scratch,
}

#[derive(Debug, Clone, Default)]
struct Scratch {
    weights: Vec<u8>,
    wide: Vec<u32>,
    row: Vec<u64>,
}

impl PartialEq for Replicates {
    fn eq(&self, o: &Self) -> bool {
        self.same_kind(o) && self.sums == o.sums
    }
}

impl Eq for Replicates {}

impl Replicates {
    /// Empty sums of `resamples` replicates (0: none, no interval) for `config` under `seed`.
    pub fn new(config: &ScoreConfig, resamples: usize, seed: u64) -> Replicates {
        let layout = Layout::new(config);
        Replicates { config: *config, layout, seed, resamples, sums: vec![0; resamples * (layout.width() + 1)], scratch: Scratch::default() }
    }

    /// Replicates kept.
    pub fn resamples(&self) -> usize {
        self.resamples
    }

    /// Seed of the weights.
    pub fn seed(&self) -> u64 {
        self.seed
    }

    /// The configuration whose statistics are summed.
    pub fn config(&self) -> &ScoreConfig {
        &self.config
    }

    fn same_kind(&self, o: &Self) -> bool {
        self.config == o.config && self.seed == o.seed && self.resamples == o.resamples
    }

    /// Add a segment with key `key` ([`segment_key`] of its id).
    pub fn add(&mut self, key: u64, s: &SegmentStats) {
        self.apply::<true>(key, s);
    }

    /// Take away what [`Replicates::add`] added for the same key and statistics (windows).
    pub fn sub(&mut self, key: u64, s: &SegmentStats) {
        self.apply::<false>(key, s);
    }

    fn apply<const ADD: bool>(&mut self, key: u64, s: &SegmentStats) {
        if self.resamples == 0 {
            return;
        }
        let mut row = std::mem::take(&mut self.scratch.row);
        row.clear();
        self.layout.encode(s, &mut row);
        self.apply_row::<ADD>(key, &row);
        self.scratch.row = row;
    }

    /// Add a segment given as its row of the configuration's fields (as the `recent` window
    /// keeps it: [`Layout::encode`]).
    pub(crate) fn add_row(&mut self, key: u64, row: &[u64]) {
        self.apply_row::<true>(key, row);
    }

    fn apply_row<const ADD: bool>(&mut self, key: u64, row: &[u64]) {
        let r = self.resamples;
        if r == 0 {
            return;
        }
        debug_assert_eq!(row.len(), self.layout.width());
        let sc = &mut self.scratch;
        sc.weights.resize(r, 0);
        fill_weights(key, self.seed, &mut sc.weights);
        sc.wide.clear();
        sc.wide.extend(sc.weights.iter().map(|&w| u32::from(w)));
        for (dst, &x) in self.sums.chunks_exact_mut(r).zip(row.iter().chain(&[1])) {
            if x == 0 {
                continue;
            }
            // Values that fit 32 bits (all real ones) take the 32 x 32 -> 64 bit multiply.
            match u32::try_from(x) {
                Ok(x) => weighted::<ADD>(dst, &sc.wide, |w| u64::from(x) * u64::from(w)),
                Err(_) => weighted::<ADD>(dst, &sc.wide, |w| x * u64::from(w)),
            }
        }
    }

    /// Add another shard's sums (same configuration, replicate count and seed).
    pub fn merge(&mut self, o: &Replicates) -> Result<(), ReplicateMismatch> {
        self.combine(o, true)
    }

    /// Take away another's sums that were added before (same kind).
    pub fn subtract(&mut self, o: &Replicates) -> Result<(), ReplicateMismatch> {
        self.combine(o, false)
    }

    fn combine(&mut self, o: &Replicates, add: bool) -> Result<(), ReplicateMismatch> {
        if !self.same_kind(o) {
            return Err(ReplicateMismatch);
        }
        // Modulo 2^64: a difference of sums taken at two moments (a window's, see
        // `session::replicates`) may pass through a negative intermediate and is exact all the
        // same once its terms are in.
        for (a, b) in self.sums.iter_mut().zip(&o.sums) {
            *a = if add { a.wrapping_add(*b) } else { a.wrapping_sub(*b) };
        }
        Ok(())
    }

    /// The statistics of replicate `r` (`segments` = its summed weights).
    pub fn replicate(&self, r: usize) -> CorpusStats {
        let w = self.layout.width();
        let row: Vec<u64> = (0..w).map(|f| self.sums[f * self.resamples + r]).collect();
        let mut st = CorpusStats::default();
        self.layout.fold(&row, &mut st, true);
        st.segments = self.sums[w * self.resamples + r];
        st
    }

    /// The score of `m` in every replicate, when configured.
    pub fn scores(&self, m: Metric) -> Option<Vec<f64>> {
        self.config.has(m).then(|| (0..self.resamples).map(|r| corpus_score(&self.replicate(r), &self.config, m).unwrap_or(0.0)).collect())
    }

    /// The percentile interval of `m` at `level`; `None` without replicates, when `m` is not
    /// configured, or before any segment.
    pub fn interval(&self, m: Metric, level: f64) -> Option<Interval> {
        if self.is_empty() {
            return None;
        }
        let (low, high) = percentile_interval(&mut self.scores(m)?, level)?;
        Some(Interval { level, low, high, resamples: self.resamples, method: METHOD, seed: self.seed })
    }

    /// Heap bytes held by the sums.
    pub fn memory_bytes(&self) -> usize {
        self.sums.capacity() * 8
    }

    /// The sums, field-major: `fields()` fields of `resamples()` sums each, the last field the
    /// summed weights (what a durable copy stores).
    pub fn sums(&self) -> &[u64] {
        &self.sums
    }

    /// Fields per replicate, the summed weight included.
    pub fn fields(&self) -> usize {
        self.layout.width() + 1
    }

    /// Sums read back from a durable copy: `None` when their number does not fit the kind.
    pub fn from_sums(config: &ScoreConfig, resamples: usize, seed: u64, sums: Vec<u64>) -> Option<Replicates> {
        let mut r = Replicates::new(config, resamples, seed);
        if sums.len() != r.sums.len() {
            return None;
        }
        r.sums = sums;
        Some(r)
    }

    /// Whether no segment was added (every summed weight is 0).
    pub fn is_empty(&self) -> bool {
        self.sums[self.layout.width() * self.resamples..].iter().all(|&w| w == 0)
    }
}

/// How a live session resamples for its intervals: replicates kept (0: none) and the seed of
/// the weights. Part of a session's definition: sessions whose intervals are to be compared or
/// summed across replicas use the same.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, serde::Deserialize)]
pub struct Resampling {
    /// Replicates (0: no intervals).
    pub resamples: usize,
    /// Seed of the weights.
    pub seed: u64,
}

impl Resampling {
    /// One line for labels and logs: `resamples=200,seed=1`.
    pub fn describe(&self) -> String {
        format!("resamples={},seed={}", self.resamples, self.seed)
    }
}

impl Default for Resampling {
    fn default() -> Self {
        Resampling { resamples: DAEMON_RESAMPLES, seed: DEFAULT_RESAMPLE_SEED }
    }
}

/// `dst[r] += term(weights[r])` (or `-=`) for every replicate r.
#[inline(always)]
fn weighted<const ADD: bool>(dst: &mut [u64], weights: &[u32], term: impl Fn(u32) -> u64) {
    if ADD {
        dst.iter_mut().zip(weights).for_each(|(d, &w)| *d += term(w));
    } else {
        dst.iter_mut().zip(weights).for_each(|(d, &w)| *d -= term(w));
    }
}

/// Replicate sums of `stats[i]` keyed by `keys[i]`, accumulated on `threads` threads over
/// contiguous shards and merged: the same sums as one pass, whatever `threads`.
pub fn accumulate(config: &ScoreConfig, resamples: usize, seed: u64, keys: &[u64], stats: &[SegmentStats], threads: usize) -> Replicates {
    assert_eq!(keys.len(), stats.len(), "one key per segment");
    let shard = |range: std::ops::Range<usize>| {
        let mut r = Replicates::new(config, resamples, seed);
        for i in range {
            r.add(keys[i], &stats[i]);
        }
        r
    };
    let n = keys.len();
    let threads = threads.clamp(1, n.max(1));
    if threads == 1 || resamples == 0 {
        return shard(0..n);
    }
    let per = n.div_ceil(threads);
    let parts: Vec<Replicates> = std::thread::scope(|sc| {
        let handles: Vec<_> = (0..threads).map(|t| (t * per).min(n)..((t + 1) * per).min(n)).map(|range| sc.spawn(move || shard(range))).collect();
        handles.into_iter().map(|h| h.join().expect("replicate thread panicked")).collect()
    });
    let mut all = Replicates::new(config, resamples, seed);
    for p in &parts {
        all.merge(p).unwrap_or_else(|_| unreachable!("shards of one kind"));
    }
    all
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::rng::SplitMix64;

    fn weights_of(id: usize, seed: u64, r: usize) -> Vec<u8> {
        let mut w = vec![0; r];
        fill_weights(segment_key(id.to_string().as_bytes()), seed, &mut w);
        w
    }

    #[test]
    fn thresholds_are_the_rounded_poisson_cdf() {
        let mut f = 0.0;
        let mut term = (-1.0f64).exp();
        for (w, &t) in POISSON1_THRESHOLDS.iter().enumerate() {
            if w > 0 {
                term /= w as f64;
            }
            f += term;
            assert_eq!(t, (f * 65536.0).round() as u32, "T_{w}");
        }
        // The grid's own mean and variance (exact rationals over 2^16).
        let mut prev = 0u32;
        let (mut mean, mut sq) = (0.0, 0.0);
        for (w, &t) in POISSON1_THRESHOLDS.iter().chain(&[65536]).enumerate() {
            let p = f64::from(t - prev) / 65536.0;
            (mean, sq) = (mean + w as f64 * p, sq + (w * w) as f64 * p);
            prev = t;
        }
        assert!((mean - 1.0).abs() < 1e-9, "{mean}");
        assert!((sq - mean * mean - 0.99997).abs() < 1e-5, "{}", sq - mean * mean);
        assert_eq!(poisson1(0), 0);
        assert_eq!(poisson1(24108), 0);
        assert_eq!(poisson1(24109), 1);
        assert_eq!(poisson1(65535), MAX_WEIGHT);
    }

    #[test]
    fn hash_test_vectors() {
        // FNV-1a 64 published test vectors (Fowler, Noll & Vo; from memory): "" and "a".
        assert_eq!(fnv1a64(b""), 0xcbf2_9ce4_8422_2325);
        assert_eq!(fnv1a64(b"a"), 0xaf63_dc4c_8601_ec8c);
        // SplitMix64 from state 0: first output (Vigna's splitmix64.c; from memory), and the
        // project's generator gives the same sequence.
        assert_eq!(mix64(GAMMA), 0xe220_a839_7b1d_cdaf);
        let mut g = SplitMix64::new(77);
        assert_eq!(g.next_u64(), mix64(77u64.wrapping_add(GAMMA)));
        // Pinned: the weights every replica must agree on (changing them changes every interval).
        assert_eq!(segment_key(b"1"), PINNED_KEY_1);
        assert_eq!(weights_of(1, DEFAULT_RESAMPLE_SEED, 12), PINNED_WEIGHTS_1);
        assert_eq!(weights_of(2, 7, 8), PINNED_WEIGHTS_2_SEED_7);
    }

    // Computed by a separate Python transcription of the steps in the module notes (not by
    // this code), so that the notes and the code are checked against each other.
    const PINNED_KEY_1: u64 = 0x4687_cd93_9ade_afdf;
    const PINNED_WEIGHTS_1: [u8; 12] = [1, 0, 2, 0, 1, 1, 0, 1, 1, 2, 1, 2];
    const PINNED_WEIGHTS_2_SEED_7: [u8; 8] = [1, 0, 0, 0, 0, 1, 1, 4];

    /// 10^6 weights: segment ids 1..=1000, replicates 0..1000.
    fn million() -> Vec<Vec<u8>> {
        (1..=1000).map(|id| weights_of(id, DEFAULT_RESAMPLE_SEED, 1000)).collect()
    }

    fn pearson(pairs: impl Iterator<Item = (u8, u8)>) -> (f64, usize) {
        let (mut n, mut sx, mut sy, mut sxx, mut syy, mut sxy) = (0usize, 0.0, 0.0, 0.0, 0.0, 0.0);
        for (x, y) in pairs {
            let (x, y) = (f64::from(x), f64::from(y));
            n += 1;
            (sx, sy, sxx, syy, sxy) = (sx + x, sy + y, sxx + x * x, syy + y * y, sxy + x * y);
        }
        let nf = n as f64;
        let cov = sxy / nf - sx / nf * sy / nf;
        let vx = sxx / nf - (sx / nf).powi(2);
        let vy = syy / nf - (sy / nf).powi(2);
        (cov / (vx * vy).sqrt(), n)
    }

    #[test]
    fn weights_have_mean_one_variance_one_and_the_poisson_shape() {
        let all: Vec<u8> = million().into_iter().flatten().collect();
        let n = all.len() as f64;
        assert_eq!(all.len(), 1_000_000);
        let mean = all.iter().map(|&w| f64::from(w)).sum::<f64>() / n;
        let var = all.iter().map(|&w| (f64::from(w) - mean).powi(2)).sum::<f64>() / (n - 1.0);
        // Poisson(1): sd of the mean = 1/sqrt(n) = 0.001; sd of the sample variance
        // = sqrt((mu4 - sigma^4) / n) = sqrt(3 / n) = 0.0017 (mu4 = 4 for Poisson(1)). Both
        // tolerances are 5 sd (normal approximation; false alarm below 1e-6).
        assert!((mean - 1.0).abs() < 5.0 * 0.001, "mean {mean}");
        assert!((var - 1.0).abs() < 5.0 * 0.0017, "variance {var}");
        // Pearson chi-square over the classes 0, 1, 2, 3, 4, >=5 against Poisson(1): 5 degrees
        // of freedom, 0.999 quantile 20.515 (chi-square tables, e.g. NIST/SEMATECH e-Handbook
        // of Statistical Methods, table 1.3.6.7.4).
        let mut counts = [0f64; 6];
        for &w in &all {
            counts[usize::from(w).min(5)] += 1.0;
        }
        let mut p = [0f64; 6];
        let mut term = (-1.0f64).exp();
        for (k, pk) in p.iter_mut().enumerate().take(5) {
            if k > 0 {
                term /= k as f64;
            }
            *pk = term;
        }
        p[5] = 1.0 - p[..5].iter().sum::<f64>();
        let chi2: f64 = counts.iter().zip(&p).map(|(&o, &pk)| (o - n * pk).powi(2) / (n * pk)).sum();
        assert!(chi2 < 20.515, "chi-square {chi2} over {counts:?}");
        assert!(all.iter().all(|&w| w <= MAX_WEIGHT));
    }

    #[test]
    fn no_correlation_between_replicates_or_neighbouring_ids() {
        let m = million();
        // Under independence the sample correlation of N pairs is about N(0, 1/N): sd
        // 1/sqrt(N) ~ 0.001 here; the tolerance is 5 sd (false alarm below 1e-6 per check).
        let tol = |n: usize| 5.0 / (n as f64).sqrt();
        let lag = |d: usize| pearson(m.iter().flat_map(move |w| (0..w.len() - d).map(move |r| (w[r], w[r + d]))));
        // Lags 1-3 read lanes of one hash; 4 the same lane of the next hash; 5 and 17 across.
        for d in [1, 2, 3, 4, 5, 17] {
            let (c, n) = lag(d);
            assert!(c.abs() < tol(n), "replicates r, r+{d}: correlation {c} over {n} pairs");
        }
        let (c, n) = pearson(m.windows(2).flat_map(|p| p[0].iter().copied().zip(p[1].iter().copied())));
        assert!(c.abs() < tol(n), "ids i, i+1: correlation {c} over {n} pairs");
        let other: Vec<Vec<u8>> = (1..=1000).map(|id| weights_of(id, DEFAULT_RESAMPLE_SEED + 1, 1000)).collect();
        let (c, n) = pearson(m.iter().zip(&other).flat_map(|(a, b)| a.iter().copied().zip(b.iter().copied())));
        assert!(c.abs() < tol(n), "seeds s, s+1: correlation {c} over {n} pairs");
    }

    fn random_stats(rng: &mut SplitMix64) -> SegmentStats {
        let mut s = SegmentStats::default();
        for n in 0..8 {
            s.bleu.totals[n] = rng.below(30);
            s.bleu.matches[n] = rng.below(s.bleu.totals[n] + 1);
        }
        s.bleu.hyp_len = rng.below(40);
        s.bleu.ref_len = rng.below(40);
        for n in 0..10 {
            s.chrf.char.hyp[n] = 1 + rng.below(60);
            s.chrf.char.reference[n] = 1 + rng.below(60);
            s.chrf.char.matches[n] = rng.below(s.chrf.char.hyp[n].min(s.chrf.char.reference[n]) + 1);
            s.chrfpp.char = s.chrf.char;
            s.chrfpp.word.hyp[n] = 1 + rng.below(9);
            s.chrfpp.word.reference[n] = 1 + rng.below(9);
            s.chrfpp.word.matches[n] = rng.below(s.chrfpp.word.hyp[n].min(s.chrfpp.word.reference[n]) + 1);
        }
        s
    }

    fn corpus(n: usize, seed: u64) -> (Vec<u64>, Vec<SegmentStats>) {
        let mut rng = SplitMix64::new(seed);
        let keys = (1..=n).map(|i| segment_key(format!("seg-{i}").as_bytes())).collect();
        (keys, (0..n).map(|_| random_stats(&mut rng)).collect())
    }

    const CONFIGS: [&str; 4] = ["bleu chrf", "bleu:order=2", "chrf++:chars=3,words=2", "bleu chrf:chars=4 chrf++"];

    #[test]
    fn replicate_sums_are_the_weighted_sums_of_the_statistics() {
        let (keys, stats) = corpus(60, 3);
        for c in CONFIGS {
            let config: ScoreConfig = c.parse().unwrap();
            let rep = accumulate(&config, 37, 9, &keys, &stats, 1);
            let all = Layout::new(&config);
            for r in [0, 1, 3, 4, 36] {
                // Straight from the weights and SegmentStats' own AddAssign, k times over.
                let mut want = CorpusStats::default();
                for (k, s) in keys.iter().zip(&stats) {
                    let mut w = vec![0; 37];
                    fill_weights(*k, 9, &mut w);
                    for _ in 0..w[r] {
                        want.add_segment(s);
                    }
                }
                // Keep only the configured fields of `want`, as the layout does.
                let mut row = Vec::new();
                let mut seg = SegmentStats { bleu: want.bleu, chrf: want.chrf, chrfpp: want.chrfpp, ..Default::default() };
                all.encode(&seg, &mut row);
                seg = all.decode(&row);
                let kept = CorpusStats { segments: want.segments, bleu: seg.bleu, chrf: seg.chrf, chrfpp: seg.chrfpp };
                assert_eq!(rep.replicate(r), kept, "{c} replicate {r}");
            }
        }
    }

    #[test]
    fn shards_sum_to_one_pass_exactly() {
        let (keys, stats) = corpus(700, 4);
        for c in CONFIGS {
            let config: ScoreConfig = c.parse().unwrap();
            let one = accumulate(&config, 200, 5, &keys, &stats, 1);
            for shards in [1, 2, 7] {
                // Round-robin shards (as a fleet's replicas would see them), merged.
                let mut merged = Replicates::new(&config, 200, 5);
                for s in 0..shards {
                    let mut part = Replicates::new(&config, 200, 5);
                    for i in (s..keys.len()).step_by(shards) {
                        part.add(keys[i], &stats[i]);
                    }
                    merged.merge(&part).unwrap();
                }
                assert_eq!(merged, one, "{c}, {shards} shards");
                // Contiguous shards on threads.
                assert_eq!(accumulate(&config, 200, 5, &keys, &stats, shards), one, "{c}, {shards} threads");
            }
            let mut w = one.clone();
            let first = accumulate(&config, 200, 5, &keys[..300], &stats[..300], 1);
            w.subtract(&first).unwrap();
            assert_eq!(w, accumulate(&config, 200, 5, &keys[300..], &stats[300..], 1), "{c}: subtracting a shard");
            for i in 300..700 {
                w.sub(keys[i], &stats[i]);
            }
            assert_eq!(w, Replicates::new(&config, 200, 5), "{c}: sub undoes add");
        }
        let config: ScoreConfig = "bleu".parse().unwrap();
        let mut a = Replicates::new(&config, 10, 1);
        assert_eq!(a.merge(&Replicates::new(&config, 10, 2)), Err(ReplicateMismatch));
        assert_eq!(a.merge(&Replicates::new(&config, 11, 1)), Err(ReplicateMismatch));
        assert_eq!(a.merge(&Replicates::new(&"chrf".parse().unwrap(), 10, 1)), Err(ReplicateMismatch));
    }

    #[test]
    fn deterministic_and_off_at_zero_replicates() {
        let (keys, stats) = corpus(400, 6);
        let config: ScoreConfig = "bleu chrf chrf++".parse().unwrap();
        let a = accumulate(&config, 300, 11, &keys, &stats, 1);
        let b = accumulate(&config, 300, 11, &keys, &stats, 3);
        assert_eq!(a, b);
        for m in Metric::ALL {
            let (ia, ib) = (a.interval(m, DEFAULT_LEVEL).unwrap(), b.interval(m, DEFAULT_LEVEL).unwrap());
            assert_eq!(ia, ib);
            assert_eq!((ia.resamples, ia.seed, ia.method, ia.level), (300, 11, METHOD, DEFAULT_LEVEL));
            let point = corpus_score(&stats.iter().fold(CorpusStats::default(), |mut c, s| {
                c.add_segment(s);
                c
            }), &config, m)
            .unwrap();
            assert!(ia.low < point && point < ia.high, "{m}: {point} outside {ia:?}");
        }
        let c = accumulate(&config, 300, 12, &keys, &stats, 1);
        assert_ne!(a.interval(Metric::Bleu, 0.95), c.interval(Metric::Bleu, 0.95), "another seed, other weights");
        let off = accumulate(&config, 0, 11, &keys, &stats, 2);
        assert_eq!(off.interval(Metric::Bleu, DEFAULT_LEVEL), None);
        assert_eq!(off.memory_bytes(), 0);
        assert_eq!(Replicates::new(&config, 50, 1).interval(Metric::Bleu, 0.95), None, "no segment yet");
        assert_eq!(a.interval(Metric::Bleu, 0.95).is_some(), a.scores(Metric::Bleu).is_some());
        let bleu_only: ScoreConfig = "bleu".parse().unwrap();
        assert_eq!(accumulate(&bleu_only, 20, 1, &keys, &stats, 1).interval(Metric::Chrf, 0.95), None);
    }

    #[test]
    fn percentile_bounds_follow_the_inverse_empirical_cdf() {
        assert_eq!(percentile_ranks(1000, 0.95), (25, 975));
        assert_eq!(percentile_ranks(200, 0.95), (5, 195));
        assert_eq!(percentile_ranks(200, 0.9), (10, 190));
        // R = 7, a = 0.025: ceil(0.175) = 1, ceil(6.825) = 7.
        assert_eq!(percentile_ranks(7, 0.95), (1, 7));
        assert_eq!(percentile_ranks(1, 0.95), (1, 1));
        let mut xs: Vec<f64> = (1..=1000).rev().map(f64::from).collect();
        assert_eq!(percentile_interval(&mut xs, 0.95), Some((25.0, 975.0)));
        assert_eq!(percentile_interval(&mut [], 0.95), None);
        assert!(valid_level(0.95) && !valid_level(1.0) && !valid_level(0.0) && !valid_level(f64::NAN));
    }
}
