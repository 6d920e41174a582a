//! The history of a session's external metrics: time buckets of their exact sums
//! ([`ExternalTotals`]: count, fixed-point sum and sum of squares per declared metric), at the
//! resolutions and for the spans of the built-in history ([`HistoryConfig`]). A step's mean
//! and its interval are derived at read time from the summed integers
//! ([`crate::external::ExternalSums::mean_interval`]); no replicate sums are kept.
//!
//! Like the built-in history it is kept across a reset (it records when values arrived) and
//! goes with the session. A bucket holds [`EXTERNAL_BUCKET_BYTES`] (32) plus 48 bytes per
//! declared metric; [`ExternalHistory::bound_bytes`] is what a session's can grow to: at the
//! default spans (12 242 buckets) 979 360 bytes for one metric, 9.8 MB for the limit of 16.

use std::collections::VecDeque;

use crate::external::{ExternalTotals, SumError};

use super::history::{floor_to, plan_steps, HistoryConfig, HistoryError, Resolution};

/// Memory of one bucket without its sums.
pub const EXTERNAL_BUCKET_BYTES: usize = std::mem::size_of::<ExternalBucket>();

/// One time bucket of external sums.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct ExternalBucket {
    /// Start, seconds since the Unix epoch (a multiple of the resolution).
    pub start: i64,
    /// Sums of the values that arrived in it.
    pub totals: ExternalTotals,
}

/// What a batch changed, for the store: buckets to write as they are now, and what aged out.
#[derive(Debug, Clone, Default, PartialEq, Eq)]
pub struct ExternalHistoryWrite {
    /// (resolution, start, sums).
    pub buckets: Vec<(Resolution, i64, ExternalTotals)>,
    /// (resolution, start): buckets that start before it are gone.
    pub dropped_before: Vec<(Resolution, i64)>,
}

/// A bucket as the store gives it back.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct StoredExternalBucket {
    /// Its resolution.
    pub resolution: Resolution,
    /// The bucket.
    pub bucket: ExternalBucket,
}

/// The buckets of one session's external metrics.
#[derive(Debug)]
pub struct ExternalHistory {
    config: HistoryConfig,
    metrics: usize,
    minutes: VecDeque<ExternalBucket>,
    hours: VecDeque<ExternalBucket>,
}

impl ExternalHistory {
    /// An empty history of `metrics` declared metrics.
    pub fn new(config: HistoryConfig, metrics: usize) -> ExternalHistory {
        ExternalHistory { config, metrics, minutes: VecDeque::new(), hours: VecDeque::new() }
    }

    /// Rebuild from stored buckets (any order); refused when a bucket has another number of
    /// metrics than the declaration.
    pub fn restore(config: HistoryConfig, metrics: usize, mut stored: Vec<StoredExternalBucket>) -> Result<ExternalHistory, String> {
        stored.sort_by_key(|b| (b.resolution.code(), b.bucket.start));
        let mut h = ExternalHistory::new(config, metrics);
        for b in stored {
            if b.bucket.totals.0.len() != metrics {
                return Err(format!("external history bucket {} ({}) has {} metrics, the session declares {metrics}", b.bucket.start, b.resolution.name(), b.bucket.totals.0.len()));
            }
            h.level_mut(b.resolution).push_back(b.bucket);
        }
        Ok(h)
    }

    /// Change the spans (the next batch prunes what they no longer keep).
    pub fn set_config(&mut self, config: HistoryConfig) {
        self.config = config;
    }

    fn level(&self, r: Resolution) -> &VecDeque<ExternalBucket> {
        match r {
            Resolution::Minute => &self.minutes,
            Resolution::Hour => &self.hours,
        }
    }

    fn level_mut(&mut self, r: Resolution) -> &mut VecDeque<ExternalBucket> {
        match r {
            Resolution::Minute => &mut self.minutes,
            Resolution::Hour => &mut self.hours,
        }
    }

    /// Heap bytes of one bucket.
    pub fn bucket_bytes(&self) -> usize {
        EXTERNAL_BUCKET_BYTES + self.metrics * std::mem::size_of::<crate::external::ExternalSums>()
    }

    /// Heap bytes held.
    pub fn memory_bytes(&self) -> usize {
        (self.minutes.len() + self.hours.len()) * self.bucket_bytes()
    }

    /// Most heap bytes it can hold (the built-in history's bucket count bound).
    pub fn bound_bytes(&self) -> usize {
        self.config.bound_bytes(self.bucket_bytes(), 0)
    }

    /// Count a batch's external sums at `now`. Nothing changes when a bucket's sums would
    /// overflow. Returns what the store is to write.
    pub fn record(&mut self, now: i64, added: &ExternalTotals) -> Result<ExternalHistoryWrite, SumError> {
        if added.0.len() != self.metrics {
            return Err(SumError::Mismatch);
        }
        // Check both resolutions before changing either.
        let mut next = Vec::with_capacity(2);
        for r in [Resolution::Minute, Resolution::Hour] {
            let start = floor_to(now, r.seconds());
            let mut totals = match self.level(r).back() {
                Some(b) if b.start >= start => b.totals.clone(),
                _ => ExternalTotals::new(self.metrics),
            };
            totals.merge(added)?;
            next.push((r, start, totals));
        }
        let mut w = ExternalHistoryWrite::default();
        for (r, start, totals) in next {
            let keep = match r {
                Resolution::Minute => self.config.minute_retention,
                Resolution::Hour => self.config.hour_retention,
            };
            let level = self.level_mut(r);
            // A batch stamped before the newest bucket (a clock stepped back) counts in it.
            match level.back_mut() {
                Some(b) if b.start >= start => b.totals = totals,
                _ => level.push_back(ExternalBucket { start, totals }),
            }
            let newest = level.back().map_or(start, |b| b.start);
            w.buckets.push((r, newest, level.back().map(|b| b.totals.clone()).unwrap_or_default()));
            let cut = floor_to(now - keep, r.seconds());
            let before = level.len();
            while level.front().is_some_and(|b| b.start < cut) {
                level.pop_front();
            }
            if level.len() < before {
                w.dropped_before.push((r, cut));
            }
        }
        Ok(w)
    }

    /// The steps `[from + k * step, from + (k + 1) * step)` that start before `until`, each the
    /// sum of the buckets that start in it, from the resolution the step calls for
    /// ([`Resolution::for_step`]); `from` is moved back to a bucket boundary. Refused as the
    /// built-in history's queries are, and when a step's sums overflow.
    pub fn query(&self, from: i64, until: i64, step: i64) -> Result<(Resolution, Vec<(i64, ExternalTotals)>), HistoryError> {
        let (r, from, n) = plan_steps(from, until, step)?;
        let mut steps: Vec<(i64, ExternalTotals)> = (0..n).map(|k| (from + k * step, ExternalTotals::new(self.metrics))).collect();
        for b in self.level(r).iter().filter(|b| b.start >= from && b.start < until) {
            let k = ((b.start - from) / step) as usize;
            let (start, totals) = &mut steps[k];
            totals.merge(&b.totals).map_err(|_| HistoryError::Overflow(*start))?;
        }
        Ok((r, steps))
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::external::{ExternalSums, ItemValues};
    use crate::rng::SplitMix64;

    /// Random items over three hours at injected times: every step at either resolution equals
    /// the sums recomputed from the values whose batches fell in it, and the means derive
    /// from them.
    #[test]
    fn steps_equal_the_sums_of_the_values_in_them() {
        let mut rng = SplitMix64::new(18);
        let t0 = 1_800_000_000; // a whole hour (common practice: any aligned instant)
        let mut h = ExternalHistory::new(HistoryConfig::default(), 2);
        let mut sent: Vec<(i64, usize, i64)> = Vec::new();
        let mut t = t0 + 3;
        while t < t0 + 3 * 3600 {
            let mut added = ExternalTotals::new(2);
            for _ in 0..rng.below(4) {
                let m = rng.below(2) as usize;
                let v = rng.below(2_000_001) as i64 - 1_000_000;
                added.add_item(&ItemValues(vec![(m, v)])).unwrap();
                sent.push((t, m, v));
            }
            h.record(t, &added).unwrap();
            t += 5 + rng.below(50) as i64;
        }
        for (from, until, step) in [(t0, t0 + 3 * 3600, 60), (t0 + 125, t0 + 2 * 3600, 300), (t0, t0 + 3 * 3600, 3600), (t0 - 3600, t0 + 4 * 3600, 7200)] {
            let (res, steps) = h.query(from, until, step).unwrap();
            assert_eq!(res, Resolution::for_step(step).unwrap());
            for (start, totals) in &steps {
                for m in 0..2 {
                    let mut want = ExternalSums::default();
                    for (_, _, v) in sent.iter().filter(|(at, mm, _)| *mm == m && *at >= *start && *at < (*start + step).min(until)) {
                        want = want.checked_add(&ExternalSums::one(*v)).unwrap();
                    }
                    assert_eq!(totals.0[m], want, "step at {start}, metric {m}");
                }
            }
            let counted: u64 = steps.iter().map(|(_, t)| t.0.iter().map(|s| s.count).sum::<u64>()).sum();
            let from = floor_to(from, res.seconds());
            assert_eq!(counted, sent.iter().filter(|(at, ..)| *at >= from && *at < until).count() as u64);
        }
    }

    /// Buckets age out at the configured spans, the store is told, and memory stays within
    /// the bound; a restored history answers every query as the one it was written from.
    #[test]
    fn buckets_age_out_and_a_restored_history_is_the_same() {
        let cfg = HistoryConfig { minute_retention: 30 * 60, hour_retention: 5 * 3600, minute_intervals: 0, hour_intervals: 0 };
        let mut h = ExternalHistory::new(cfg, 1);
        let t0 = 1_800_000_000;
        let mut stored: Vec<StoredExternalBucket> = Vec::new();
        let mut saw_drop = false;
        for m in 0..(10 * 60) {
            let mut added = ExternalTotals::new(1);
            added.add_item(&ItemValues(vec![(0, m)])).unwrap();
            let w = h.record(t0 + m * 60 + 1, &added).unwrap();
            for (r, start, totals) in w.buckets {
                stored.retain(|s| (s.resolution, s.bucket.start) != (r, start));
                stored.push(StoredExternalBucket { resolution: r, bucket: ExternalBucket { start, totals } });
            }
            for (r, cut) in w.dropped_before {
                saw_drop = true;
                stored.retain(|s| s.resolution != r || s.bucket.start >= cut);
            }
            assert!(h.memory_bytes() <= h.bound_bytes());
        }
        assert!(saw_drop);
        assert_eq!(h.minutes.len(), 31, "30 minutes of retention and the open minute");
        assert_eq!(h.hours.len(), 6);
        let back = ExternalHistory::restore(cfg, 1, stored.clone()).unwrap();
        for (from, step) in [(t0 + 9 * 3600, 60), (t0, 3600)] {
            assert_eq!(back.query(from, t0 + 10 * 3600, step).unwrap(), h.query(from, t0 + 10 * 3600, step).unwrap());
        }
        assert!(ExternalHistory::restore(cfg, 2, stored).is_err(), "another declaration");
    }

    /// The bound quoted in the module documentation: at the default spans, a bucket of one
    /// metric and the most a session declaring the limit of metrics can hold.
    #[test]
    fn memory_bound_at_the_defaults() {
        let one = ExternalHistory::new(HistoryConfig::default(), 1);
        assert_eq!(one.bucket_bytes(), EXTERNAL_BUCKET_BYTES + 48, "count u64 and two i128, aligned to 16");
        assert_eq!((EXTERNAL_BUCKET_BYTES, one.bound_bytes()), (32, 979_360), "the start and the Vec; 12 242 buckets of 80 bytes");
        let most = ExternalHistory::new(HistoryConfig::default(), crate::external::MAX_EXTERNAL_METRICS);
        // 10 081 minute and 2 161 hourly buckets (the built-in history's bound).
        assert_eq!(most.bound_bytes(), (10_081 + 2_161) * (EXTERNAL_BUCKET_BYTES + 16 * 48));
        // Printed for the report (cargo test -- --nocapture).
        println!("external bucket {} B + 48 B a metric; bound {} B at {} metrics", EXTERNAL_BUCKET_BYTES, most.bound_bytes(), crate::external::MAX_EXTERNAL_METRICS);
    }

    /// Sums that would overflow change nothing; a batch stamped before the newest bucket
    /// counts in it.
    #[test]
    fn overflow_changes_nothing_and_a_late_stamp_counts_in_the_newest_bucket() {
        let mut h = ExternalHistory::new(HistoryConfig::default(), 1);
        let t0 = 1_800_000_000;
        let big = ExternalTotals(vec![ExternalSums { count: 1, sum: i128::MAX - 1, squares: 0 }]);
        h.record(t0, &big).unwrap();
        assert!(h.record(t0 + 1, &big).is_err());
        assert_eq!(h.minutes[0].totals, big);
        let mut h = ExternalHistory::new(HistoryConfig::default(), 1);
        let one = ExternalTotals(vec![ExternalSums::one(5)]);
        h.record(t0 + 120, &one).unwrap();
        h.record(t0 + 30, &one).unwrap();
        assert_eq!(h.minutes.len(), 1);
        assert_eq!(h.minutes[0].totals.0[0].count, 2);
    }
}
