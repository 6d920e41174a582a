//! Metrics: sufficient statistics (integers, additive across segments, replicas and time) and
//! the scores derived from them at read time. Pure: no I/O, no async.
//!
//! - [`bleu`]: Papineni et al. 2002: clipped n-gram precision, geometric mean, brevity penalty;
//!   sentence-level smoothing after Chen & Cherry 2014.
//! - [`chrf`]: Popović 2015 (chrF) and 2017 (chrF++): character (and word) n-gram F-score.
//! - [`ngram`]: the exact n-gram counting both use (packed integer keys, gram tables).
//! - [`resample`]: bootstrap replicates (Poisson weights per segment, weighted integer sums)
//!   and the percentile intervals derived from them.
//! - [`compare`]: two systems on the same segments: the difference of their scores, its paired
//!   bootstrap interval and an approximate-randomization p-value.
//! - [`scores`]: every score of a corpus or a segment under a configuration, derived in one place
//!   for all outputs.

pub mod bleu;
pub mod chrf;
pub mod compare;
mod config;
pub(crate) mod layout;
pub mod ngram;
pub mod resample;
pub mod scores;

pub use bleu::{BleuScore, BleuStats, RefLength, Smoothing, TokenCounts};
pub use chrf::{ChrfScore, ChrfStats, OrderCounts};
pub use config::{BleuParams, ChrfParams, ConfigError, Metric, MetricSpec, Metrics, ScoreConfig, DEFAULT_METRICS};

use serde::{Deserialize, Serialize};

/// Largest BLEU n-gram order accepted.
pub const MAX_BLEU_ORDER: usize = 8;
/// BLEU n-gram order used unless configured (Papineni et al. 2002 use 4).
pub const DEFAULT_BLEU_ORDER: usize = 4;
/// Largest chrF character n-gram order accepted.
pub const MAX_CHRF_CHAR_ORDER: usize = 10;
/// chrF character n-gram order used unless configured (Popović 2015 recommend 6).
pub const DEFAULT_CHRF_CHAR_ORDER: usize = 6;
/// Largest chrF++ word n-gram order accepted.
pub const MAX_CHRF_WORD_ORDER: usize = 4;
/// chrF word n-gram order used unless configured: none (Popović 2015).
pub const DEFAULT_CHRF_WORD_ORDER: usize = 0;
/// chrF++ word n-gram order used unless configured (Popović 2017 recommend 2).
pub const DEFAULT_CHRFPP_WORD_ORDER: usize = 2;
/// chrF beta used unless configured: recall weighted twice as much as precision (Popović 2015).
pub const DEFAULT_CHRF_BETA: f64 = 2.0;
/// Epsilon added to zero match counts by the `epsilon` sentence smoothing (Chen & Cherry 2014,
/// method 1; 0.1 is common practice and NLTK 3.10.4's default).
pub const DEFAULT_EPSILON: f64 = 0.1;

/// The statistics of one scored segment: what every metric needs, nothing derived.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq, Serialize, Deserialize)]
pub struct SegmentStats {
    /// BLEU statistics (zero when BLEU is not configured).
    pub bleu: BleuStats,
    /// chrF statistics of the reference chosen for chrF (its orders only).
    pub chrf: ChrfStats,
    /// Index of the reference chosen for chrF.
    pub chrf_ref: u32,
    /// chrF++ statistics of the reference chosen for chrF++ (its orders only).
    pub chrfpp: ChrfStats,
    /// Index of the reference chosen for chrF++.
    pub chrfpp_ref: u32,
}

/// Statistics of a corpus (any set of scored segments): sums of [`SegmentStats`].
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq, Serialize, Deserialize)]
pub struct CorpusStats {
    /// Number of scored segments.
    pub segments: u64,
    /// Summed BLEU statistics.
    pub bleu: BleuStats,
    /// Summed chrF statistics.
    pub chrf: ChrfStats,
    /// Summed chrF++ statistics.
    pub chrfpp: ChrfStats,
}

impl CorpusStats {
    /// Add one segment.
    pub fn add_segment(&mut self, s: &SegmentStats) {
        self.segments += 1;
        self.bleu += s.bleu;
        self.chrf += s.chrf;
        self.chrfpp += s.chrfpp;
    }

    /// [`CorpusStats::add_segment`] for the parts a configuration scores: BLEU when `bleu`, chrF
    /// and chrF++ when `chrf` (the other parts of `s` are zero, so skipping them changes nothing).
    #[inline]
    pub fn add_scored_parts(&mut self, s: &SegmentStats, bleu: bool, chrf: bool) {
        self.segments += 1;
        if bleu {
            self.bleu += s.bleu;
        }
        if chrf {
            self.chrf += s.chrf;
            self.chrfpp += s.chrfpp;
        }
    }

    /// Remove what [`CorpusStats::add_segment`] added (for sliding windows).
    pub fn sub_segment(&mut self, s: &SegmentStats) {
        self.segments -= 1;
        self.bleu -= s.bleu;
        self.chrf -= s.chrf;
        self.chrfpp -= s.chrfpp;
    }
}

impl std::ops::AddAssign for CorpusStats {
    fn add_assign(&mut self, o: Self) {
        self.segments += o.segments;
        self.bleu += o.bleu;
        self.chrf += o.chrf;
        self.chrfpp += o.chrfpp;
    }
}

impl std::ops::SubAssign for CorpusStats {
    /// Take away a part that was added before (a later total minus an earlier one).
    fn sub_assign(&mut self, o: Self) {
        self.segments -= o.segments;
        self.bleu -= o.bleu;
        self.chrf -= o.chrf;
        self.chrfpp -= o.chrfpp;
    }
}

impl std::ops::Add for CorpusStats {
    type Output = Self;
    fn add(mut self, o: Self) -> Self {
        self += o;
        self
    }
}

impl std::iter::Sum for CorpusStats {
    fn sum<I: Iterator<Item = Self>>(iter: I) -> Self {
        iter.fold(Self::default(), |a, b| a + b)
    }
}

/// Add element-wise.
pub(crate) fn add_arrays<const N: usize>(a: &mut [u64; N], b: &[u64; N]) {
    for (x, y) in a.iter_mut().zip(b) {
        *x += *y;
    }
}

/// Subtract element-wise.
pub(crate) fn sub_arrays<const N: usize>(a: &mut [u64; N], b: &[u64; N]) {
    for (x, y) in a.iter_mut().zip(b) {
        *x -= *y;
    }
}
