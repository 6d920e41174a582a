//! The simulated deployment of `alert-bench`: generated systems on a generated reference set,
//! their segments scored by real sessions of a real server state, and the daemon's own alert
//! evaluator ([`crate::server::alerting::evaluate`]) run on them every evaluation period.
//!
//! Two sessions on one reference set: `production`, always fed a stable system, and
//! `candidate`, the one the rules watch, fed another stable system of the same quality (its
//! own random errors) until a switch, then a degraded one. Each segment names a reference item
//! drawn at random; both sessions score the same item at the same position, so that a `drop`
//! rule's windows hold the same segments (as a replayed probe set gives them).

use std::collections::HashMap;
use std::sync::Arc;

use super::super::demo::corpus::{length_range, Noise, Vocabulary, CORPUS_NOISE};
use crate::alerts::rules::Rule;
use crate::metric::scores::corpus_score;
use crate::metric::{CorpusStats, Metric, MetricSpec, ScoreConfig, SegmentStats};
use crate::refs::compiled::{Compiled, Scratch};
use crate::refs::{RefSet, SegmentInput};
use crate::rng::SplitMix64;
use crate::server::alerting::{evaluate, AlertBoard, Pair};
use crate::server::{Limits, State};
use crate::session::{ItemKey, Outcome, Session};

/// Name of the reference set the sessions score against.
pub const REFSET: &str = "probe";
/// The session fed the stable system throughout (baseline of `drop` rules).
pub const PRODUCTION: &str = "production";
/// The session the rules watch.
pub const CANDIDATE: &str = "candidate";
/// Widest degradation the calibration tries: this much more chance of replacing a word.
const MAX_EXTRA_REPLACE: f64 = 0.75;
/// Bisection steps of the calibration: the chance is then known to 0.75 / 2^20, far finer than
/// the sampling noise of the BLEU it is calibrated on.
const CALIBRATION_STEPS: usize = 20;
/// Seconds of simulated time the first evaluation happens at (any fixed value would do).
const START_UNIX: i64 = 1_800_000_000;

/// Why the simulation could not be set up.
#[derive(Debug, thiserror::Error)]
pub enum SimError {
    /// The server state refused the reference set or a session.
    #[error("setting up the simulated daemon: {0}")]
    Setup(#[from] crate::server::ServiceError),
    /// The calibration cannot reach the drop asked for.
    #[error("a drop of {target} BLEU points is out of reach: the most degraded system is {reached:.2} points below the stable one")]
    Unreachable {
        /// The drop asked for.
        target: f64,
        /// The largest drop the calibration reached.
        reached: f64,
    },
}

/// The generated reference set and the systems that translate it.
pub struct Systems {
    vocab: Vocabulary,
    items: Vec<Vec<usize>>,
    ids: Vec<String>,
    config: ScoreConfig,
}

/// The BLEU-only configuration of the sessions (default tokenizer, parameters and smoothing):
/// the rules judge BLEU, and the statistics of other metrics would not change their decisions.
pub fn bleu_config() -> ScoreConfig {
    ScoreConfig::new(crate::text::DEFAULT_TOKENIZER, false, [MetricSpec::default_for(Metric::Bleu)]).unwrap_or_else(|_| unreachable!("the default BLEU parameters are valid"))
}

impl Systems {
    /// A reference set of `items` generated segments (about `mean_tokens` words each, a Zipf
    /// vocabulary of `vocab` invented words).
    pub fn new(items: usize, mean_tokens: usize, vocab: usize, seed: u64) -> Systems {
        let vocab = Vocabulary::zipf(vocab);
        let mut rng = SplitMix64::new(seed);
        let lengths = length_range(mean_tokens);
        let items: Vec<Vec<usize>> = (0..items.max(1)).map(|_| vocab.reference(lengths, &mut rng)).collect();
        let ids = (1..=items.len()).map(|i| format!("seg-{i}")).collect();
        Systems { vocab, items, ids, config: bleu_config() }
    }

    /// Items in the reference set.
    pub fn items(&self) -> usize {
        self.items.len()
    }

    /// The reference set, for a server state.
    pub fn refset(&self) -> RefSet {
        let mut text = String::new();
        let segments = self.items.iter().zip(&self.ids).map(|(words, id)| {
            self.vocab.join_into(words, &mut text);
            SegmentInput { id: id.clone(), source: None, refs: vec![text.clone()] }
        });
        RefSet::new(segments).unwrap_or_else(|_| unreachable!("generated ids are unique and every item has a word"))
    }

    /// Corpus BLEU of a system with `noise` over `segments` items drawn at random under
    /// `seed`, scored by the same compiled tables a session builds.
    pub fn corpus_bleu(&self, compiled: &Compiled, noise: Noise, segments: usize, seed: u64) -> f64 {
        let mut rng = SplitMix64::new(seed);
        let (mut scratch, mut one, mut sum) = (Scratch::default(), SegmentStats::default(), CorpusStats::default());
        let (mut words, mut text) = (Vec::new(), String::new());
        for _ in 0..segments {
            let i = rng.index(self.items.len());
            noise.copy_into(&self.items[i], &self.vocab, &mut rng, &mut words);
            self.vocab.join_into(&words, &mut text);
            compiled.score_segment_into(i, &text, &mut scratch, &mut one);
            sum.add_segment(&one);
        }
        corpus_score(&sum, &self.config, Metric::Bleu).unwrap_or(0.0)
    }

    /// Compiled tables of the reference set for the sessions' configuration.
    pub fn compile(&self) -> Compiled {
        Compiled::build(Arc::new(self.refset()), self.config)
    }

    /// The extra chance of replacing a word that makes the system `target` BLEU points worse
    /// than the stable one (`stable`: its BLEU on the same sample), found by bisection on
    /// `segments` segments under `seed` (the same segments and random draws for every try).
    pub fn calibrate(&self, compiled: &Compiled, stable: f64, target: f64, segments: usize, seed: u64) -> Result<f64, SimError> {
        let drop_at = |extra: f64| stable - self.corpus_bleu(compiled, CORPUS_NOISE.with_extra_replace(extra), segments, seed);
        let reached = drop_at(MAX_EXTRA_REPLACE);
        if reached < target {
            return Err(SimError::Unreachable { target, reached });
        }
        let (mut lo, mut hi) = (0.0, MAX_EXTRA_REPLACE);
        for _ in 0..CALIBRATION_STEPS {
            let mid = 0.5 * (lo + hi);
            if drop_at(mid) < target {
                lo = mid;
            } else {
                hi = mid;
            }
        }
        Ok(0.5 * (lo + hi))
    }
}

/// A fixed window of `size` segments being filled.
#[derive(Debug, Clone)]
struct Filling {
    size: u64,
    stats: CorpusStats,
}

/// A window the fixed-window test closed: its index among the sizes, the segments scored when
/// it closed, and its corpus BLEU.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct ClosedWindow {
    /// Index into the window sizes.
    pub size_index: usize,
    /// Segments of the stream at the window's end.
    pub end: u64,
    /// The window's corpus BLEU.
    pub bleu: f64,
}

/// One simulated daemon: the state with its two sessions, the rules and their trackers, and
/// the fixed-window tests over the candidate's segments.
pub struct Deployment<'a> {
    systems: &'a Systems,
    state: State,
    production: Arc<Session>,
    candidate: Arc<Session>,
    rules: Arc<Vec<Rule>>,
    board: AlertBoard,
    trackers: HashMap<(String, String), Pair>,
    now: i64,
    eval_seconds: i64,
    scored: u64,
    scratch: Scratch,
    words: Vec<usize>,
    text: String,
    /// The replay order of the items, and the position in it.
    order: Vec<usize>,
    cursor: usize,
    windows: Vec<Filling>,
    /// Windows closed since the caller last took them.
    pub closed: Vec<ClosedWindow>,
}

impl<'a> Deployment<'a> {
    /// A state with the reference set and the two sessions (the daemon's default window and
    /// replicates), the `rules`, evaluated every `eval_seconds` of simulated time, and
    /// fixed-window tests of `window_sizes` segments.
    /// `seed` shuffles the replay order.
    pub fn new(systems: &'a Systems, rules: Arc<Vec<Rule>>, eval_seconds: u64, window_sizes: &[u64], seed: u64) -> Result<Deployment<'a>, SimError> {
        let state = State::new(None, Limits::default())?;
        state.insert_refset(REFSET, systems.refset(), false)?;
        let session = |name: &str| -> Result<Arc<Session>, SimError> {
            let spec = state.session_spec(name, REFSET, systems.config, Default::default(), 0, Default::default())?;
            Ok(state.create_session(spec, false)?.0)
        };
        let (production, candidate) = (session(PRODUCTION)?, session(CANDIDATE)?);
        let mut order: Vec<usize> = (0..systems.items.len()).collect();
        let mut rng = SplitMix64::new(seed);
        for i in (1..order.len()).rev() {
            order.swap(i, rng.index(i + 1));
        }
        Ok(Deployment {
            systems,
            state,
            production,
            candidate,
            rules,
            board: AlertBoard::default(),
            trackers: HashMap::new(),
            now: START_UNIX,
            eval_seconds: eval_seconds as i64,
            scored: 0,
            scratch: Scratch::default(),
            words: Vec::new(),
            text: String::new(),
            order,
            cursor: 0,
            windows: window_sizes.iter().map(|&size| Filling { size: size.max(1), stats: CorpusStats::default() }).collect(),
            closed: Vec::new(),
        })
    }

    /// Start over at position `start` of the replay order: both sessions reset (as a reset
    /// through the API does), new trackers, empty windows.
    pub fn restart(&mut self, start: usize) {
        self.cursor = start % self.order.len();
        self.production.reset();
        self.candidate.reset();
        self.trackers = HashMap::new();
        self.scored = 0;
        for w in &mut self.windows {
            w.stats = CorpusStats::default();
        }
        self.closed.clear();
    }

    /// Segments scored since the start.
    pub fn scored(&self) -> u64 {
        self.scored
    }

    fn score(&mut self, session_is_candidate: bool, item: usize, noise: Noise, rng: &mut SplitMix64) -> Outcome {
        let s = self.systems;
        noise.copy_into(&s.items[item], &s.vocab, rng, &mut self.words);
        s.vocab.join_into(&self.words, &mut self.text);
        let session = if session_is_candidate { &self.candidate } else { &self.production };
        session.score_item(ItemKey::Id(&s.ids[item]), &self.text, &mut self.scratch)
    }

    /// One evaluation period: `count` segments, scored by both sessions and applied to them as
    /// one batch each (with their replicate sums, as the server applies a batch), the
    /// candidate's from the stable system up to segment `switch` and from `degraded` after;
    /// then one round of the daemon's evaluator. Returns, per rule, whether it started firing.
    pub fn period(&mut self, count: usize, switch: u64, degraded: Noise, rng: &mut SplitMix64) -> Vec<bool> {
        let (mut prod, mut cand) = (Vec::with_capacity(count), Vec::with_capacity(count));
        for _ in 0..count {
            let item = self.order[self.cursor];
            self.cursor = (self.cursor + 1) % self.order.len();
            prod.push(self.score(false, item, CORPUS_NOISE, rng));
            let noise = if self.scored < switch { CORPUS_NOISE } else { degraded };
            let o = self.score(true, item, noise, rng);
            self.scored += 1;
            if let Outcome::Scored { stats, .. } = &o {
                self.fill_windows(stats);
            }
            cand.push(o);
        }
        self.production.apply("", 0, &prod, 0, None);
        self.candidate.apply("", 0, &cand, 0, None);
        self.now += self.eval_seconds;
        self.trackers = evaluate(&self.state, &self.rules, std::mem::take(&mut self.trackers), &self.board, None, self.now);
        let board = self.board.of(CANDIDATE);
        self.rules.iter().map(|r| board.iter().any(|a| a.rule == r.name && a.state == "firing" && a.since_unix == self.now)).collect()
    }

    fn fill_windows(&mut self, stats: &SegmentStats) {
        for (i, w) in self.windows.iter_mut().enumerate() {
            w.stats.add_segment(stats);
            if w.stats.segments == w.size {
                let bleu = corpus_score(&w.stats, &self.systems.config, Metric::Bleu).unwrap_or(0.0);
                self.closed.push(ClosedWindow { size_index: i, end: self.scored, bleu });
                w.stats = CorpusStats::default();
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The calibration finds a degradation whose BLEU drop, measured on an independent sample,
    /// is the one asked for within sampling noise.
    #[test]
    fn calibration_achieves_the_requested_drop() {
        let systems = Systems::new(2_000, 20, 2_000, 5);
        let compiled = systems.compile();
        let n = 20_000;
        let stable = systems.corpus_bleu(&compiled, CORPUS_NOISE, n, 1);
        for target in [1.0, 3.0] {
            let extra = systems.calibrate(&compiled, stable, target, n, 1).unwrap();
            assert!(extra > 0.0 && extra < MAX_EXTRA_REPLACE, "{extra}");
            // Another sample: the standard error of a corpus BLEU over 20,000 segments of 20
            // words is about 0.1 point here, of the difference of two such about 0.15; 0.5
            // points is over three of them (common practice).
            let measured = systems.corpus_bleu(&compiled, CORPUS_NOISE, n, 2) - systems.corpus_bleu(&compiled, CORPUS_NOISE.with_extra_replace(extra), n, 3);
            assert!((measured - target).abs() < 0.5, "target {target}, measured {measured:.3} (extra {extra:.4})");
        }
        assert!(matches!(systems.calibrate(&compiled, stable, 99.0, 1_000, 1), Err(SimError::Unreachable { .. })));
    }
}
