//! Comparing two systems scored on the same segments: both corpus scores, their difference, a
//! confidence interval of the difference (paired bootstrap) and a p-value (approximate
//! randomization). Pure: no I/O; threads only to share the work, never to change a result.
//!
//! Input: per segment its key ([`resample::segment_key`] of the segment id) and the statistics
//! of system A and of system B on it, as parallel slices. Offline that is every segment of the
//! reference set; a live comparison passes the segments both sessions hold.
//!
//! # Interval of the difference: paired bootstrap
//! The paired bootstrap (Koehn 2004, "Statistical significance tests for machine translation
//! evaluation") resamples segments and recomputes both systems' corpus scores on the same
//! resample. Here a replicate reweights the segments with the Poisson(1) weights of
//! [`resample`]: the weights are a function of segment key, replicate and seed, so both systems
//! get the same weight on a segment in a replicate: they are paired by segment id. Replicate r
//! gives `d_r = score_A(r) - score_B(r)`; the interval is a percentile interval of d_1..d_R with
//! tail-symmetric ranks: `low = d_(k)`, `high = d_(R + 1 - k)`, `k = ceil(a R)`,
//! `a = (1 - L) / 2` (for R = 1000 and L = 0.95: d_(25) and d_(976)). Each bound leaves fewer
//! than a R replicates strictly outside on its side, and the interval of B - A is exactly the
//! interval of A - B negated, bounds swapped.
//!
//! # p-value: approximate randomization
//! Under the null hypothesis that the two systems are exchangeable on every segment, swapping
//! the two outputs of a segment leaves the distribution of the corpus scores unchanged
//! (Noreen 1989, "Computer-Intensive Methods for Testing Hypotheses"; Riezler & Maxwell 2005 for
//! MT metrics). A trial swaps each segment's pair with probability 1/2 and recomputes the
//! difference; c counts the trials with `|difference| >= |observed difference|` (up to
//! [`TIE_TOLERANCE`] for rounding), and the p-value is `(c + 1) / (trials + 1)`, which is never 0
//! and is a valid p-value for a finite number of trials (Noreen 1989, ch. 3).
//!
//! Trial t swaps the segment with key k when bit `t mod 64` of
//! `mix64(base + (t / 64 + 1) * 0x9E3779B97F4A7C15)` (mod 2^64) is 1, with
//! `base = mix64(k ^ mix64(seed ^ SWAP_DOMAIN))` ([`swap_word`]): a function of key, trial and
//! seed, so the p-value does not depend on the order of the segments nor on the threads, and the
//! coins are unrelated to the bootstrap weights of the same seed (those start from `mix64(seed)`).
//!
//! # Computation
//! A trial that swaps the set S has `A' = A - D_S`, `B' = B + D_S` with
//! `D_S = sum over S of (a_i - b_i)`, per integer field. Segments with equal statistics
//! (`a_i = b_i`) and fields where no segment differs are dropped first. The rest go in groups of
//! 8: the 256 subset sums of a group's difference rows are tabulated once per block of trials,
//! and each trial adds the one table row its 8 coins pick (one row addition per 8 segments per
//! trial instead of one per swapped segment). Integers stay exact (i64).

use serde::Serialize;

use super::layout::Layout;
use super::resample::{self, accumulate, mix64, percentile_ranks, Interval, Replicates};
use super::scores::corpus_score;
use super::{CorpusStats, Metric, ScoreConfig, SegmentStats};

/// Randomization trials unless configured. Measured (release build, 2 cores, loaded machine):
/// 100,000 segments of about 25 words that all differ between the systems, BLEU and chrF,
/// take about 2.6 s of CPU for 10,000 trials, about as much as the 1000 bootstrap replicates of
/// both systems; segments where the systems agree cost nothing.
pub const DEFAULT_TRIALS: usize = 10_000;
/// Most randomization trials accepted.
pub const MAX_TRIALS: usize = 1_000_000;
/// How the interval of the difference is made, as written in outputs.
pub const DIFFERENCE_METHOD: &str = "paired-poisson-bootstrap-percentile";
/// How the p-value is made, as written in outputs.
pub const TEST_METHOD: &str = "approximate-randomization";
/// A trial's |difference| this close below the observed one (score points) still counts as at
/// least as large: equal differences computed along other rounding paths are ties.
pub const TIE_TOLERANCE: f64 = 1e-9;
/// Mixed into the seed for the swap coins, so that they differ from the bootstrap weights of the
/// same seed (the first 64 bits of the fractional part of pi; any constant would do).
pub const SWAP_DOMAIN: u64 = 0x243F_6A88_85A3_08D3;

/// Increment of the SplitMix64 sequence (2^64 / golden ratio, odd), as in [`resample`].
const GAMMA: u64 = 0x9E37_79B9_7F4A_7C15;
/// Segments per subset-sum table.
const GROUP: usize = 8;
/// Trials per block (a multiple of 64): the block's running sums (trials x fields x 8 bytes)
/// stay in a core's cache; the tables are rebuilt once per block.
const TRIAL_BLOCK: usize = 2048;

/// What a comparison is asked for with.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct CompareSettings {
    /// Bootstrap replicates for the interval (0: no interval).
    pub resamples: usize,
    /// Seed of the bootstrap weights and of the swap coins.
    pub seed: u64,
    /// Confidence level of the intervals, strictly between 0 and 1.
    pub level: f64,
    /// Randomization trials for the p-value (0: no p-value).
    pub trials: usize,
}

impl Default for CompareSettings {
    /// The offline defaults.
    fn default() -> Self {
        CompareSettings { resamples: resample::OFFLINE_RESAMPLES, seed: resample::DEFAULT_RESAMPLE_SEED, level: resample::DEFAULT_LEVEL, trials: DEFAULT_TRIALS }
    }
}

/// One system's corpus score, with its own bootstrap interval.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct SystemScore {
    /// Corpus score, 0-100.
    pub score: f64,
    /// Percentile interval of the score (the same replicates as the difference's).
    pub interval: Option<Interval>,
}

/// The comparison of the two systems under one metric.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct MetricComparison {
    /// Which metric; not written, it is the key the comparison sits under.
    #[serde(skip)]
    pub metric: Metric,
    /// Segments behind the numbers (scored by both systems).
    pub segments: u64,
    /// System A.
    pub a: SystemScore,
    /// System B.
    pub b: SystemScore,
    /// `a.score - b.score`.
    pub difference: f64,
    /// Paired-bootstrap interval of the difference ([`DIFFERENCE_METHOD`]); `None` without
    /// replicates or segments.
    pub interval: Option<Interval>,
    /// Approximate-randomization p-value `(c + 1) / (trials + 1)`; `None` without trials or
    /// segments.
    pub p_value: Option<f64>,
    /// Trials run.
    pub trials: usize,
    /// c: the trials whose |difference| was at least the observed one.
    pub extreme_trials: usize,
}

/// Every configured metric's comparison, in output order.
#[derive(Debug, Clone, PartialEq)]
pub struct Comparison {
    /// Segments compared.
    pub segments: u64,
    /// The settings used.
    pub settings: CompareSettings,
    /// One entry per configured metric.
    pub metrics: Vec<MetricComparison>,
}

impl Comparison {
    /// The comparison under `m`, when configured.
    pub fn get(&self, m: Metric) -> Option<&MetricComparison> {
        self.metrics.iter().find(|c| c.metric == m)
    }
}

/// Compare system A with system B on the segments with keys `keys`, `a[i]` and `b[i]` being the
/// two systems' statistics on segment i (parallel slices, equal lengths), on up to `threads`
/// threads (results never depend on it).
pub fn compare(config: &ScoreConfig, keys: &[u64], a: &[SegmentStats], b: &[SegmentStats], settings: &CompareSettings, threads: usize) -> Comparison {
    assert!(keys.len() == a.len() && a.len() == b.len(), "one key and two statistics per segment");
    let n = keys.len();
    let sum = |s: &[SegmentStats]| {
        s.iter().fold(CorpusStats::default(), |mut c, x| {
            c.add_segment(x);
            c
        })
    };
    let (ca, cb) = (sum(a), sum(b));
    let reps = (n > 0 && settings.resamples > 0).then(|| {
        (accumulate(config, settings.resamples, settings.seed, keys, a, threads), accumulate(config, settings.resamples, settings.seed, keys, b, threads))
    });
    let extreme = (n > 0 && settings.trials > 0).then(|| randomization(config, keys, a, b, settings.trials, settings.seed, threads));
    let metrics = config
        .metric_list()
        .enumerate()
        .map(|(j, m)| {
            let (sa, sb) = (corpus_score(&ca, config, m).unwrap_or(0.0), corpus_score(&cb, config, m).unwrap_or(0.0));
            let c = extreme.as_ref().map_or(0, |e| e[j].1);
            MetricComparison {
                metric: m,
                segments: n as u64,
                a: SystemScore { score: sa, interval: reps.as_ref().and_then(|(ra, _)| ra.interval(m, settings.level)) },
                b: SystemScore { score: sb, interval: reps.as_ref().and_then(|(_, rb)| rb.interval(m, settings.level)) },
                difference: sa - sb,
                interval: reps.as_ref().and_then(|(ra, rb)| difference_interval(ra, rb, m, settings.level)),
                p_value: extreme.as_ref().map(|_| p_value(c, settings.trials)),
                trials: if extreme.is_some() { settings.trials } else { 0 },
                extreme_trials: c,
            }
        })
        .collect();
    Comparison { segments: n as u64, settings: *settings, metrics }
}

/// `(c + 1) / (trials + 1)`.
pub fn p_value(extreme: usize, trials: usize) -> f64 {
    (extreme as f64 + 1.0) / (trials as f64 + 1.0)
}

/// Per replicate, `score_A(r) - score_B(r)` under `m`: replicate sums of the two systems over
/// the same segments with the same seed and replicate count; `None` when `m` is not configured
/// or the two are not of one kind.
pub fn replicate_differences(ra: &Replicates, rb: &Replicates, m: Metric) -> Option<Vec<f64>> {
    if ra.config() != rb.config() || ra.seed() != rb.seed() || ra.resamples() != rb.resamples() {
        return None;
    }
    let (sa, sb) = (ra.scores(m)?, rb.scores(m)?);
    Some(sa.iter().zip(&sb).map(|(x, y)| x - y).collect())
}

/// The percentile interval of `xs` at `level` with tail-symmetric ranks (see the module notes);
/// sorts them; `None` when empty.
pub fn symmetric_interval(xs: &mut [f64], level: f64) -> Option<(f64, f64)> {
    if xs.is_empty() {
        return None;
    }
    xs.sort_by(f64::total_cmp);
    let r = xs.len();
    let (k, _) = percentile_ranks(r, level);
    Some((xs[k - 1], xs[r - k]))
}

/// The paired-bootstrap interval of `score_A - score_B` under `m` at `level`; `None` when `m` is
/// not configured, the replicates are of different kinds, or they hold no segment.
pub fn difference_interval(ra: &Replicates, rb: &Replicates, m: Metric, level: f64) -> Option<Interval> {
    // No segment yet: no interval (as Replicates::interval).
    ra.interval(m, level)?;
    let mut d = replicate_differences(ra, rb, m)?;
    let (low, high) = symmetric_interval(&mut d, level)?;
    Some(Interval { level, low, high, resamples: ra.resamples(), method: DIFFERENCE_METHOD, seed: ra.seed() })
}

/// The start of a segment's swap coins under `seed`.
#[inline]
pub fn swap_base(key: u64, seed: u64) -> u64 {
    mix64(key ^ mix64(seed ^ SWAP_DOMAIN))
}

/// The swap coins of the segment with key `key` in trials `64 w .. 64 w + 63` under `seed`:
/// bit j is 1 when trial `64 w + j` swaps the segment's two outputs.
pub fn swap_word(key: u64, seed: u64, w: u64) -> u64 {
    coins(swap_base(key, seed), w)
}

#[inline]
fn coins(base: u64, w: u64) -> u64 {
    mix64(base.wrapping_add(w.wrapping_add(1).wrapping_mul(GAMMA)))
}

/// Byte t of `SPREAD[x]` is bit t of x: eight coins of one segment, one per trial byte.
const SPREAD: [u64; 256] = {
    let mut t = [0u64; 256];
    let mut x = 0;
    while x < 256 {
        let mut bit = 0;
        while bit < 8 {
            t[x] |= (((x >> bit) & 1) as u64) << (8 * bit);
            bit += 1;
        }
        x += 1;
    }
    t
};

/// The segments that differ, as rows of the fields that differ anywhere.
struct Differences {
    layout: Layout,
    /// Field sums of A and of B over all segments (`layout.width()` each).
    sum_a: Vec<u64>,
    sum_b: Vec<u64>,
    /// Indices (in the layout) of the fields where some segment differs.
    fields: Vec<usize>,
    /// Per differing segment, `a - b` over `fields` (row-major).
    rows: Vec<i64>,
    /// Per differing segment, [`swap_base`].
    bases: Vec<u64>,
    segments: u64,
}

impl Differences {
    fn new(config: &ScoreConfig, keys: &[u64], a: &[SegmentStats], b: &[SegmentStats], seed: u64) -> Differences {
        let layout = Layout::new(config);
        let w = layout.width();
        let (mut sum_a, mut sum_b) = (vec![0u64; w], vec![0u64; w]);
        let (mut ra, mut rb) = (Vec::with_capacity(w), Vec::with_capacity(w));
        let mut full: Vec<i64> = Vec::new();
        let mut differs = vec![false; w];
        let mut bases = Vec::new();
        for ((k, x), y) in keys.iter().zip(a).zip(b) {
            ra.clear();
            rb.clear();
            layout.encode(x, &mut ra);
            layout.encode(y, &mut rb);
            for f in 0..w {
                sum_a[f] += ra[f];
                sum_b[f] += rb[f];
            }
            if ra != rb {
                for f in 0..w {
                    let d = ra[f] as i64 - rb[f] as i64;
                    differs[f] |= d != 0;
                    full.push(d);
                }
                bases.push(swap_base(*k, seed));
            }
        }
        let fields: Vec<usize> = (0..w).filter(|&f| differs[f]).collect();
        let rows = full.chunks_exact(w.max(1)).flat_map(|r| fields.iter().map(move |&f| r[f])).collect();
        Differences { layout, sum_a, sum_b, fields, rows, bases, segments: keys.len() as u64 }
    }

    /// The corpus statistics of A and of B after taking `d` (over `fields`) from A and giving it
    /// to B.
    fn swapped(&self, d: &[i64], row_a: &mut Vec<u64>, row_b: &mut Vec<u64>) -> (CorpusStats, CorpusStats) {
        row_a.clone_from(&self.sum_a);
        row_b.clone_from(&self.sum_b);
        for (&f, &x) in self.fields.iter().zip(d) {
            row_a[f] = (row_a[f] as i64 - x) as u64;
            row_b[f] = (row_b[f] as i64 + x) as u64;
        }
        let fold = |row: &[u64]| {
            let mut st = CorpusStats::default();
            self.layout.fold(row, &mut st, true);
            st.segments = self.segments;
            st
        };
        (fold(row_a), fold(row_b))
    }
}

/// Per configured metric (in output order), c: the randomization trials `0..trials` whose
/// |score_A' - score_B'| is at least the observed |score_A - score_B| (within
/// [`TIE_TOLERANCE`]). Parallel slices as in [`compare`].
pub fn randomization(config: &ScoreConfig, keys: &[u64], a: &[SegmentStats], b: &[SegmentStats], trials: usize, seed: u64, threads: usize) -> Vec<(Metric, usize)> {
    assert!(keys.len() == a.len() && a.len() == b.len(), "one key and two statistics per segment");
    let metrics: Vec<Metric> = config.metric_list().collect();
    let diff = Differences::new(config, keys, a, b, seed);
    let score_diffs = |d: &[i64], ra: &mut Vec<u64>, rb: &mut Vec<u64>| {
        let (x, y) = diff.swapped(d, ra, rb);
        metrics.iter().map(move |&m| corpus_score(&x, config, m).unwrap_or(0.0) - corpus_score(&y, config, m).unwrap_or(0.0))
    };
    let (mut ra, mut rb) = (Vec::new(), Vec::new());
    let observed: Vec<f64> = score_diffs(&vec![0; diff.fields.len()], &mut ra, &mut rb).map(f64::abs).collect();
    let swaps = SwapRows { rows: &diff.rows, bases: &diff.bases, width: diff.fields.len() };
    let counts = swaps.count_trials(trials, threads, metrics.len(), || (Vec::new(), Vec::new()), |(ra, rb), d, count| {
        for (j, x) in score_diffs(d, ra, rb).enumerate() {
            count[j] += usize::from(x.abs() >= observed[j] - TIE_TOLERANCE);
        }
    });
    metrics.iter().zip(counts).map(|(&m, c)| (m, c)).collect()
}

/// What the randomization swaps, in any integer statistics: per item whose two systems differ,
/// its row of differences `a - b` (`width` values) and its [`swap_word`] start (the same
/// coins for every user of the engine: a function of key, trial and seed).
pub struct SwapRows<'a> {
    /// Row-major, `width` values per item.
    pub rows: &'a [i64],
    /// Per item, `mix64(key ^ mix64(seed ^ SWAP_DOMAIN))` ([`swap_base`]).
    pub bases: &'a [u64],
    /// Values per row.
    pub width: usize,
}

impl SwapRows<'_> {
    /// Run trials `0..trials` on up to `threads` threads: each trial's D_S (the sum of the rows
    /// its coins swap, `width` values) goes to `judge` with a per-thread state from `state` and
    /// `counters` counters; the counters summed over all trials (results never depend on the
    /// threads).
    pub fn count_trials<S, M, J>(&self, trials: usize, threads: usize, counters: usize, state: M, judge: J) -> Vec<usize>
    where
        M: Fn() -> S + Sync,
        J: Fn(&mut S, &[i64], &mut [usize]) + Sync,
    {
        let blocks = trials.div_ceil(TRIAL_BLOCK);
        let next = std::sync::atomic::AtomicUsize::new(0);
        let w = self.width;
        let work = || {
            let mut count = vec![0usize; counters];
            let mut st = state();
            let mut sums = Vec::new();
            let mut table = Vec::new();
            loop {
                let blk = next.fetch_add(1, std::sync::atomic::Ordering::Relaxed);
                if blk >= blocks {
                    return count;
                }
                let first = blk * TRIAL_BLOCK;
                let n = TRIAL_BLOCK.min(trials - first);
                block_sums(self, first, n, &mut table, &mut sums);
                for t in 0..n {
                    judge(&mut st, &sums[t * w..(t + 1) * w], &mut count);
                }
            }
        };
        let threads = threads.clamp(1, blocks.max(1));
        let counts: Vec<Vec<usize>> = if threads == 1 {
            vec![work()]
        } else {
            std::thread::scope(|s| {
                let handles: Vec<_> = (0..threads).map(|_| s.spawn(work)).collect();
                handles.into_iter().map(|h| h.join().expect("randomization thread panicked")).collect()
            })
        };
        (0..counters).map(|j| counts.iter().map(|c| c[j]).sum()).collect()
    }
}

/// `sums[t * w ..][..w]` = D_S of trial `first + t` for t in `0..n` (`first` a multiple of 64).
fn block_sums(diff: &SwapRows<'_>, first: usize, n: usize, table: &mut Vec<i64>, sums: &mut Vec<i64>) {
    debug_assert_eq!(first % 64, 0);
    let w = diff.width;
    sums.clear();
    sums.resize(n * w, 0);
    if w == 0 {
        return;
    }
    let words = n.div_ceil(64);
    let first_word = (first / 64) as u64;
    let mut picks = vec![0u8; words * 64];
    table.resize((1 << GROUP) * w, 0);
    for (rows, bases) in diff.rows.chunks(GROUP * w).zip(diff.bases.chunks(GROUP)) {
        let g = bases.len();
        // table[s] = the sum of the rows of the group's segments in subset s (bit j: segment j).
        table[..w].fill(0);
        for s in 1..(1usize << g) {
            let (low, rest) = (s.trailing_zeros() as usize, s & (s - 1));
            let (done, todo) = table.split_at_mut(s * w);
            let (prev, row) = (&done[rest * w..(rest + 1) * w], &rows[low * w..(low + 1) * w]);
            for ((t, &p), &r) in todo[..w].iter_mut().zip(prev).zip(row) {
                *t = p + r;
            }
        }
        // picks[t] = the subset trial first + t swaps: bit j = coin of segment j.
        for (wd, out) in picks.chunks_exact_mut(64).enumerate() {
            let mut c = [0u64; GROUP];
            for (cj, &base) in c.iter_mut().zip(bases) {
                *cj = coins(base, first_word + wd as u64);
            }
            for (byte, out8) in out.chunks_exact_mut(8).enumerate() {
                let mut x = 0u64;
                for (j, &cj) in c.iter().enumerate() {
                    x |= SPREAD[((cj >> (8 * byte)) & 0xFF) as usize] << j;
                }
                out8.copy_from_slice(&x.to_le_bytes());
            }
        }
        for (acc, &p) in sums.chunks_exact_mut(w).zip(&picks) {
            let row = &table[usize::from(p) * w..(usize::from(p) + 1) * w];
            for (x, &r) in acc.iter_mut().zip(row) {
                *x += r;
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::metric::resample::{fill_weights, segment_key};
    use crate::rng::SplitMix64;

    /// Binomial(n, p) by n coin flips.
    fn binomial(rng: &mut SplitMix64, n: u64, p: f64) -> u64 {
        (0..n).filter(|_| rng.chance(p)).count() as u64
    }

    /// Statistics of an invented segment whose n-grams match with probability `q` per order
    /// step (shaped like real ones: totals fall by one per order, matches never exceed them).
    fn segment(rng: &mut SplitMix64, q: f64) -> SegmentStats {
        let mut s = SegmentStats::default();
        let r = 4 + rng.below(27);
        let h = (r + rng.below(7)).saturating_sub(3).max(1);
        for n in 0..8 {
            s.bleu.totals[n] = h.saturating_sub(n as u64);
            s.bleu.matches[n] = binomial(rng, s.bleu.totals[n], q.powi(n as i32 + 1));
        }
        (s.bleu.hyp_len, s.bleu.ref_len) = (h, r);
        let (hc, rc) = (5 * h, 5 * r);
        for n in 0..10 {
            s.chrf.char.hyp[n] = hc.saturating_sub(n as u64);
            s.chrf.char.reference[n] = rc.saturating_sub(n as u64);
            s.chrf.char.matches[n] = binomial(rng, s.chrf.char.hyp[n].min(s.chrf.char.reference[n]), q.powf(0.5 + n as f64 / 4.0));
        }
        s.chrfpp.char = s.chrf.char;
        for n in 0..4 {
            s.chrfpp.word.hyp[n] = h.saturating_sub(n as u64);
            s.chrfpp.word.reference[n] = r.saturating_sub(n as u64);
            s.chrfpp.word.matches[n] = s.bleu.matches[n].min(s.chrfpp.word.reference[n]);
        }
        s
    }

    fn keys(n: usize) -> Vec<u64> {
        (1..=n).map(|i| segment_key(i.to_string().as_bytes())).collect()
    }

    /// n segments of quality `qa` for A, and B's of quality `qb`, drawn independently.
    fn systems(n: usize, qa: f64, qb: f64, seed: u64) -> (Vec<u64>, Vec<SegmentStats>, Vec<SegmentStats>) {
        let mut rng = SplitMix64::new(seed);
        let a = (0..n).map(|_| segment(&mut rng, qa)).collect();
        let b = (0..n).map(|_| segment(&mut rng, qb)).collect();
        (keys(n), a, b)
    }

    /// A copy of `a` with a share `keep` of each match kept (words replaced or dropped): a
    /// clearly degraded system on the same segments.
    fn degraded(a: &[SegmentStats], keep: f64, seed: u64) -> Vec<SegmentStats> {
        let mut rng = SplitMix64::new(seed);
        a.iter()
            .map(|s| {
                let mut d = *s;
                for m in d.bleu.matches.iter_mut().chain(&mut d.chrf.char.matches).chain(&mut d.chrfpp.word.matches) {
                    *m = binomial(&mut rng, *m, keep);
                }
                d.chrfpp.char = d.chrf.char;
                d
            })
            .collect()
    }

    const CONFIGS: [&str; 4] = ["bleu chrf", "bleu:order=2", "chrf++:chars=3,words=2", "bleu chrf:chars=4 chrf++"];

    fn settings(resamples: usize, trials: usize, seed: u64) -> CompareSettings {
        CompareSettings { resamples, seed, level: 0.95, trials }
    }

    /// The randomization written the plain way: per trial, per segment, its coin, then both
    /// corpora summed from the (possibly swapped) segment statistics.
    fn naive_extreme(config: &ScoreConfig, keys: &[u64], a: &[SegmentStats], b: &[SegmentStats], trials: usize, seed: u64) -> Vec<usize> {
        let sum = |pick: &dyn Fn(usize) -> SegmentStats| {
            (0..a.len()).fold(CorpusStats::default(), |mut c, i| {
                c.add_segment(&pick(i));
                c
            })
        };
        let diff = |x: &CorpusStats, y: &CorpusStats, m| corpus_score(x, config, m).unwrap() - corpus_score(y, config, m).unwrap();
        let (ca, cb) = (sum(&|i| a[i]), sum(&|i| b[i]));
        let obs: Vec<f64> = config.metric_list().map(|m| diff(&ca, &cb, m).abs()).collect();
        let mut count = vec![0; obs.len()];
        for t in 0..trials {
            let swap = |i: usize| (swap_word(keys[i], seed, (t / 64) as u64) >> (t % 64)) & 1 == 1;
            let x = sum(&|i| if swap(i) { b[i] } else { a[i] });
            let y = sum(&|i| if swap(i) { a[i] } else { b[i] });
            for (j, m) in config.metric_list().enumerate() {
                count[j] += usize::from(diff(&x, &y, m).abs() >= obs[j] - TIE_TOLERANCE);
            }
        }
        count
    }

    #[test]
    fn the_tabulated_randomization_counts_what_the_plain_loop_counts() {
        // 37 segments (not a multiple of 8), 2100 trials (more than one block, not a multiple
        // of 64); systems close enough that c is neither 0 nor every trial.
        let (k, a, b) = systems(37, 0.5, 0.5, 21);
        for c in CONFIGS {
            let config: ScoreConfig = c.parse().unwrap();
            let want = naive_extreme(&config, &k, &a, &b, 2100, 5);
            assert!(want.iter().any(|&x| x > 0 && x < 2100), "{c}: {want:?}");
            for threads in [1, 3] {
                let got: Vec<usize> = randomization(&config, &k, &a, &b, 2100, 5, threads).into_iter().map(|(_, x)| x).collect();
                assert_eq!(got, want, "{c}, {threads} threads");
            }
        }
        // Some segments equal in both systems (skipped by the engine, not by the plain loop).
        let mut b2 = b.clone();
        for i in (0..37).step_by(3) {
            b2[i] = a[i];
        }
        let config: ScoreConfig = "bleu chrf++".parse().unwrap();
        let got: Vec<usize> = randomization(&config, &k, &a, &b2, 700, 9, 2).into_iter().map(|(_, x)| x).collect();
        assert_eq!(got, naive_extreme(&config, &k, &a, &b2, 700, 9));
    }

    #[test]
    fn identical_systems_differ_by_nothing() {
        let (k, a, _) = systems(200, 0.6, 0.6, 1);
        for c in CONFIGS {
            let config: ScoreConfig = c.parse().unwrap();
            let r = compare(&config, &k, &a, &a, &settings(300, 500, 1), 2);
            assert_eq!(r.metrics.len(), config.metric_list().count());
            for m in &r.metrics {
                assert_eq!(m.difference, 0.0, "{c} {}", m.metric);
                let i = m.interval.unwrap();
                assert_eq!((i.low, i.high), (0.0, 0.0), "{c} {}", m.metric);
                assert_eq!((m.p_value, m.extreme_trials, m.trials), (Some(1.0), 500, 500), "{c} {}", m.metric);
                assert_eq!(m.a, m.b);
                assert_eq!(m.segments, 200);
            }
        }
    }

    #[test]
    fn a_degraded_copy_is_told_apart() {
        let (k, a, _) = systems(400, 0.6, 0.6, 2);
        let b = degraded(&a, 0.85, 3);
        let config: ScoreConfig = "bleu chrf chrf++".parse().unwrap();
        let r = compare(&config, &k, &a, &b, &settings(500, 2000, 1), 2);
        for m in &r.metrics {
            let i = m.interval.unwrap();
            assert!(m.difference > 0.0, "{m:?}");
            assert!(i.low > 0.0 && i.low < m.difference && m.difference < i.high, "{m:?}");
            // No trial comes near: p = 1 / (trials + 1).
            assert!(m.p_value.unwrap() < 0.01, "{m:?}");
            assert_eq!(m.extreme_trials, 0, "{m:?}");
            assert_eq!((i.method, i.resamples, i.seed, i.level), (DIFFERENCE_METHOD, 500, 1, 0.95));
            assert!(m.a.interval.unwrap().low > m.b.interval.unwrap().low);
        }
    }

    #[test]
    fn b_against_a_is_a_against_b_negated() {
        let (k, a, b) = systems(300, 0.55, 0.52, 4);
        for c in CONFIGS {
            let config: ScoreConfig = c.parse().unwrap();
            let s = settings(400, 1500, 8);
            let (ab, ba) = (compare(&config, &k, &a, &b, &s, 2), compare(&config, &k, &b, &a, &s, 1));
            for (x, y) in ab.metrics.iter().zip(&ba.metrics) {
                assert_eq!(x.difference, -y.difference, "{c}");
                let (ix, iy) = (x.interval.unwrap(), y.interval.unwrap());
                assert_eq!((ix.low, ix.high), (-iy.high, -iy.low), "{c}");
                assert_eq!((x.p_value, x.extreme_trials), (y.p_value, y.extreme_trials), "{c}");
                assert_eq!((x.a, x.b), (y.b, y.a), "{c}");
            }
        }
    }

    #[test]
    fn deterministic_under_a_seed_whatever_the_threads_and_the_order() {
        // Systems close enough that c is neither 0 nor every trial (checked below).
        let (k, a, b) = systems(250, 0.505, 0.5, 5);
        let config: ScoreConfig = "bleu chrf++".parse().unwrap();
        let s = settings(300, 3000, 3);
        let one = compare(&config, &k, &a, &b, &s, 1);
        assert_eq!(compare(&config, &k, &a, &b, &s, 1), one);
        assert_eq!(compare(&config, &k, &a, &b, &s, 4), one);
        // The same segments in another order: weights and coins follow the keys.
        let order: Vec<usize> = (0..250).rev().collect();
        let pick = |v: &[SegmentStats]| order.iter().map(|&i| v[i]).collect::<Vec<_>>();
        let k2: Vec<u64> = order.iter().map(|&i| k[i]).collect();
        assert_eq!(compare(&config, &k2, &pick(&a), &pick(&b), &s, 2), one);
        let other = compare(&config, &k, &a, &b, &settings(300, 3000, 4), 1);
        let (x, y) = (one.get(Metric::Bleu).unwrap(), other.get(Metric::Bleu).unwrap());
        assert_eq!(x.difference, y.difference);
        assert_ne!(x.interval, y.interval, "another seed, other weights");
        assert!(x.extreme_trials > 0 && x.extreme_trials < 3000, "{x:?}");
        assert_ne!(x.extreme_trials, y.extreme_trials, "another seed, other coins");
        assert!(one.get(Metric::Chrf).is_none());
    }

    #[test]
    fn nothing_to_test_without_segments_trials_or_replicates() {
        let config: ScoreConfig = "bleu chrf".parse().unwrap();
        let r = compare(&config, &[], &[], &[], &CompareSettings::default(), 2);
        assert_eq!(r.segments, 0);
        for m in &r.metrics {
            assert_eq!((m.interval, m.p_value, m.trials, m.a.interval), (None, None, 0, None));
        }
        let (k, a, b) = systems(20, 0.6, 0.5, 6);
        let r = compare(&config, &k, &a, &b, &settings(0, 0, 1), 1);
        assert!(r.metrics.iter().all(|m| m.interval.is_none() && m.p_value.is_none() && m.difference != 0.0));
        assert_eq!(CompareSettings::default().trials, DEFAULT_TRIALS);
        assert_eq!(p_value(0, 9999), 1e-4);
    }

    #[test]
    fn exchangeable_systems_give_uniform_p_values() {
        // Under the null (each segment's two outputs drawn from one distribution) the p-value
        // (c + 1) / (T + 1) is uniform up to its grid: P(p <= 0.2) = 0.2. Over 120 corpora the
        // share is Binomial(120, 0.2) / 120, sd 0.0365; 3 sd (normal approximation) allow
        // 0.09..0.31.
        let config: ScoreConfig = "bleu".parse().unwrap();
        let low = (0..120u64)
            .filter(|&c| {
                let (k, a, b) = systems(40, 0.55, 0.55, 1000 + c);
                compare(&config, &k, &a, &b, &settings(0, 199, c), 1).metrics[0].p_value.unwrap() <= 0.2
            })
            .count();
        let share = low as f64 / 120.0;
        assert!((share - 0.2).abs() <= 3.0 * 0.0365, "share of p <= 0.2: {share}");
    }

    #[test]
    fn coins_are_fair_and_apart_from_the_bootstrap_weights() {
        // 1000 keys x 640 trials: the share of swaps has sd 0.5 / sqrt(640000) = 0.000625; the
        // tolerance is 5 sd (normal approximation; false alarm below 1e-6). The correlation of
        // the coins with the Poisson weights of the same key, replicate = trial and seed is
        // about N(0, 1/N) under independence; 5 sd again.
        let (mut ones, mut n) = (0u64, 0u64);
        let (mut sx, mut sy, mut sxx, mut syy, mut sxy) = (0.0, 0.0, 0.0, 0.0, 0.0);
        for k in keys(1000) {
            let mut wts = vec![0u8; 640];
            fill_weights(k, 1, &mut wts);
            for t in 0..640 {
                let x = ((swap_word(k, 1, (t / 64) as u64) >> (t % 64)) & 1) as f64;
                let y = f64::from(wts[t]);
                ones += x as u64;
                n += 1;
                (sx, sy, sxx, syy, sxy) = (sx + x, sy + y, sxx + x * x, syy + y * y, sxy + x * y);
            }
        }
        let nf = n as f64;
        assert!((ones as f64 / nf - 0.5).abs() < 5.0 * 0.000625, "share {}", ones as f64 / nf);
        let r = (sxy / nf - sx / nf * sy / nf) / ((sxx / nf - (sx / nf).powi(2)) * (syy / nf - (sy / nf).powi(2))).sqrt();
        assert!(r.abs() < 5.0 / nf.sqrt(), "correlation {r}");
        assert_eq!(SPREAD[0b1000_0101], 0x0100_0000_0001_0001);
    }

    #[test]
    fn the_difference_interval_takes_tail_symmetric_ranks() {
        let mut xs: Vec<f64> = (1..=1000).rev().map(f64::from).collect();
        assert_eq!(symmetric_interval(&mut xs, 0.95), Some((25.0, 976.0)));
        let mut neg: Vec<f64> = (1..=1000).map(|x| -f64::from(x)).collect();
        assert_eq!(symmetric_interval(&mut neg, 0.95), Some((-976.0, -25.0)));
        assert_eq!(symmetric_interval(&mut [3.0], 0.95), Some((3.0, 3.0)));
        assert_eq!(symmetric_interval(&mut [], 0.95), None);
        // The interval is over the per-replicate differences of the paired replicates.
        let (k, a, b) = systems(100, 0.6, 0.5, 7);
        let config: ScoreConfig = "chrf".parse().unwrap();
        let (ra, rb) = (accumulate(&config, 200, 2, &k, &a, 1), accumulate(&config, 200, 2, &k, &b, 1));
        let mut d: Vec<f64> = ra.scores(Metric::Chrf).unwrap().iter().zip(rb.scores(Metric::Chrf).unwrap()).map(|(x, y)| x - y).collect();
        d.sort_by(f64::total_cmp);
        let i = difference_interval(&ra, &rb, Metric::Chrf, 0.95).unwrap();
        assert_eq!((i.low, i.high), (d[4], d[195]));
        assert_eq!(difference_interval(&ra, &accumulate(&config, 200, 3, &k, &b, 1), Metric::Chrf, 0.95), None, "unpaired seeds");
    }
}
