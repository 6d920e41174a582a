//! The bookkeeping of `alert-bench`, apart from the simulation: when a detector counts as having
//! found a drop, percentiles of delays with trials that never found it, and the threshold of
//! the fixed-window test at a given number of false alarms. Pure functions, unit-tested on
//! hand-made sequences.

/// What one detector did in one trial with a switch from the stable to the degraded system
/// after `switch` segments.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub struct TrialWatch {
    /// It fired while every segment it had seen was from the stable system: a false alarm,
    /// and the trial does not count for this detector's delay.
    pub fired_before_switch: bool,
    /// Segments from the switch to the first firing after it (None: not yet).
    pub delay: Option<u64>,
}

impl TrialWatch {
    /// Take one evaluation made after `scored` segments of which the first `switch` were
    /// stable; `fired`: the detector started firing at this evaluation.
    pub fn observe(&mut self, scored: u64, switch: u64, fired: bool) {
        if !fired || self.delay.is_some() {
            return;
        }
        if scored <= switch {
            self.fired_before_switch = true;
        } else if !self.fired_before_switch {
            self.delay = Some(scored - switch);
        }
    }

    /// Whether the trial is settled for this detector (found the drop, or disqualified).
    pub fn settled(&self) -> bool {
        self.fired_before_switch || self.delay.is_some()
    }
}

/// Delays of the trials of one detector and one drop size.
#[derive(Debug, Clone, PartialEq, Eq, serde::Serialize)]
pub struct DelaySummary {
    /// Trials that count (those without a false alarm before the switch).
    pub trials: usize,
    /// Of those, the trials that found the drop within the cap.
    pub detected: usize,
    /// Trials left out because the detector fired before the switch.
    pub fired_before_switch: usize,
    /// Median delay in segments; None when more than half the trials never found the drop
    /// within the cap (or no trial counts).
    pub median: Option<u64>,
    /// 90th percentile, likewise.
    pub p90: Option<u64>,
}

/// The value at rank ceil(q n) (1-based, clamped to 1..=n) of the delays sorted ascending,
/// a trial that never found the drop counting as longer than any delay (Hyndman & Fan 1996,
/// definition 1: the inverse of the empirical distribution function; as the percentile
/// intervals of `metric::resample`). Outer None: no trials; inner None: the rank falls on a
/// trial that never found the drop.
pub fn percentile(delays: &[Option<u64>], q: f64) -> Option<Option<u64>> {
    if delays.is_empty() {
        return None;
    }
    let mut v: Vec<u64> = delays.iter().map(|d| d.unwrap_or(u64::MAX)).collect();
    v.sort_unstable();
    let n = v.len();
    let rank = ((q * n as f64).ceil() as usize).clamp(1, n);
    let x = v[rank - 1];
    Some((x != u64::MAX).then_some(x))
}

/// Summarise the trials of one detector.
pub fn summarise(watches: &[TrialWatch]) -> DelaySummary {
    let counted: Vec<Option<u64>> = watches.iter().filter(|w| !w.fired_before_switch).map(|w| w.delay).collect();
    DelaySummary {
        trials: counted.len(),
        detected: counted.iter().filter(|d| d.is_some()).count(),
        fired_before_switch: watches.len() - counted.len(),
        median: percentile(&counted, 0.5).flatten(),
        p90: percentile(&counted, 0.9).flatten(),
    }
}

/// The threshold of a fixed-window test (alarm when a window's score is below it) that lets
/// exactly `allowed` of the stable windows `scores` alarm (fewer when scores tie): the
/// (allowed + 1)-th smallest score; +inf when every window may alarm; None without windows.
pub fn window_threshold(scores: &[f64], allowed: usize) -> Option<f64> {
    if scores.is_empty() {
        return None;
    }
    let mut v = scores.to_vec();
    v.sort_by(f64::total_cmp);
    Some(v.get(allowed).copied().unwrap_or(f64::INFINITY))
}

/// Windows among `scores` that alarm at `threshold` (score strictly below it).
pub fn window_alarms(scores: &[f64], threshold: f64) -> usize {
    scores.iter().filter(|&&s| s < threshold).count()
}

/// The delay of a fixed-window test in one trial: `windows` are the (segments from the switch
/// to the window's end, score) of the windows that end after the switch, in order; the first
/// one below `threshold` finds the drop.
pub fn window_delay(windows: &[(u64, f64)], threshold: f64) -> Option<u64> {
    windows.iter().find(|(_, s)| *s < threshold).map(|(d, _)| *d)
}

/// False alarms per million segments.
pub fn per_million(alarms: u64, segments: u64) -> f64 {
    if segments == 0 {
        return 0.0;
    }
    alarms as f64 * 1e6 / segments as f64
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_trial_counts_the_first_firing_after_the_switch_and_disqualifies_earlier_ones() {
        // Switch after 1000 segments; evaluations every 50.
        let mut w = TrialWatch::default();
        for scored in (50..=1000).step_by(50) {
            w.observe(scored, 1000, false);
        }
        w.observe(1050, 1000, false);
        w.observe(1100, 1000, true);
        w.observe(1150, 1000, true);
        assert_eq!(w, TrialWatch { fired_before_switch: false, delay: Some(100) });
        assert!(w.settled());
        // An evaluation at exactly the switch has seen only stable segments: a false alarm.
        let mut early = TrialWatch::default();
        early.observe(1000, 1000, true);
        early.observe(1300, 1000, true);
        assert_eq!(early, TrialWatch { fired_before_switch: true, delay: None });
        // One that never fires is not settled and has no delay.
        let mut never = TrialWatch::default();
        never.observe(5000, 1000, false);
        assert!(!never.settled() && never.delay.is_none());
    }

    #[test]
    fn percentiles_count_undetected_trials_as_longest() {
        let d = [Some(300), None, Some(100), Some(200), None];
        // Sorted: 100 200 300 inf inf; median rank ceil(2.5) = 3 -> 300; p90 rank 5 -> never.
        assert_eq!(percentile(&d, 0.5), Some(Some(300)));
        assert_eq!(percentile(&d, 0.9), Some(None));
        assert_eq!(percentile(&d, 0.0), Some(Some(100)), "rank clamped to 1");
        assert_eq!(percentile(&[], 0.5), None);
        let ten: Vec<Option<u64>> = (1..=10).map(|k| Some(k * 10)).collect();
        assert_eq!(percentile(&ten, 0.9), Some(Some(90)), "rank ceil(9.0) = 9");
        assert_eq!(percentile(&ten, 0.5), Some(Some(50)));
        let watches = [
            TrialWatch { fired_before_switch: true, delay: None },
            TrialWatch { fired_before_switch: false, delay: Some(400) },
            TrialWatch { fired_before_switch: false, delay: None },
            TrialWatch { fired_before_switch: false, delay: Some(200) },
        ];
        let s = summarise(&watches);
        assert_eq!((s.trials, s.detected, s.fired_before_switch, s.median, s.p90), (3, 2, 1, Some(400), None));
    }

    #[test]
    fn the_window_threshold_lets_exactly_the_allowed_windows_alarm() {
        let stable = [40.0, 38.5, 41.2, 37.9, 39.4, 40.8];
        // Zero allowed: the smallest stable score; no stable window is below it.
        let t0 = window_threshold(&stable, 0).unwrap();
        assert_eq!(t0, 37.9);
        assert_eq!(window_alarms(&stable, t0), 0);
        for allowed in 1..stable.len() {
            let t = window_threshold(&stable, allowed).unwrap();
            assert_eq!(window_alarms(&stable, t), allowed, "allowed {allowed}");
        }
        assert_eq!(window_threshold(&stable, 6), Some(f64::INFINITY));
        assert_eq!(window_threshold(&[], 0), None);
        // Ties: never more than allowed.
        let tied = [30.0, 30.0, 31.0];
        assert_eq!(window_alarms(&tied, window_threshold(&tied, 1).unwrap()), 0);
        // The delay is the first window after the switch below the threshold.
        let after = [(200, 38.0), (700, 37.5), (1200, 36.0)];
        assert_eq!(window_delay(&after, 37.9), Some(700));
        assert_eq!(window_delay(&after, 35.0), None);
        assert_eq!(per_million(3, 10_000_000), 0.3);
        assert_eq!(per_million(0, 0), 0.0);
    }
}
