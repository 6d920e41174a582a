//! `mtgauge alert-bench`: how often the alert rules fire on a stable system, and how fast they
//! find a degraded one, measured on the real scoring, session and evaluator code (see
//! [`sim`]), beside a fixed-window test held to the same number of false alarms. Prints
//! figures; asserts nothing about time.

mod count;
mod sim;

use std::io::Write;
use std::sync::atomic::{AtomicUsize, Ordering};
use std::sync::{Arc, Mutex};
use std::time::Instant;

use clap::Args;
use serde::Serialize;
use serde_json::json;

use self::count::{per_million, summarise, window_alarms, window_delay, window_threshold, DelaySummary, TrialWatch};
use self::sim::{Deployment, Systems, CANDIDATE, PRODUCTION};
use super::bench::{DEFAULT_BENCH_TOKENS, DEFAULT_BENCH_VOCAB};
use super::demo::corpus::{Noise, CORPUS_NOISE};
use super::{default_threads, CliError};
use crate::alerts::rules::{check_rules, Rule, RuleEntry, DEFAULT_DROP_FOR_SEGMENTS, DEFAULT_DROP_WINDOW_SEGMENTS, DEFAULT_EVAL_SECONDS, DEFAULT_FOR_SECONDS, DEFAULT_FOR_SEGMENTS, DEFAULT_MIN_SEGMENTS};
use crate::alerts::shift::BASELINE_CHUNKS;
use crate::metric::resample::DAEMON_RESAMPLES;
use crate::rng::SplitMix64;
use crate::session::DEFAULT_WINDOW;

/// Segments of the stable run unless told.
pub const DEFAULT_STABLE_SEGMENTS: u64 = 10_000_000;
/// Trials per drop size unless told.
pub const DEFAULT_TRIALS: usize = 50;
/// Drop sizes in BLEU points unless told.
pub const DEFAULT_DROPS: [f64; 3] = [1.0, 2.0, 5.0];
/// The drops the rules are set for (`below`: threshold this far under the stable level;
/// `drop` and `decline`: `points`) unless told.
pub const DEFAULT_RULE_POINTS: [f64; 2] = [1.0, 2.0];
/// Segments per second the simulated daemon receives unless told; with the evaluation period
/// this is the number of segments between two evaluations.
pub const DEFAULT_RATE: u64 = 10;
/// Segments after the switch a trial watches at most unless told.
pub const DEFAULT_CAP: u64 = 20_000;
/// Items of the generated reference set unless told.
pub const DEFAULT_REF_ITEMS: usize = 50_000;
/// Segments each step of the calibration of the degraded systems scores unless told.
pub const DEFAULT_CALIBRATION_SEGMENTS: usize = 100_000;
/// Stable segments every trial starts with at least: the `recent` window full, and the
/// `decline` test's baseline learned (its chunks of `min_segments`) with chunks to spare.
pub const WARMUP_SEGMENTS: u64 = 14_000;
/// The switch falls uniformly within this many segments after the warm-up, so that it meets
/// the rules in every phase of their windows and chunks.
pub const SWITCH_SPREAD: u64 = 4_000;
/// Window sizes of the fixed-window test, in segments.
pub const FIXED_WINDOWS: [u64; 8] = [100, 200, 500, 1_000, 2_000, 5_000, 10_000, 20_000];
/// Seed of the generated data unless told.
pub const DEFAULT_SEED: u64 = 13;

const _: () = assert!(WARMUP_SEGMENTS >= DEFAULT_WINDOW as u64 && WARMUP_SEGMENTS > (BASELINE_CHUNKS as u64 + 1) * DEFAULT_MIN_SEGMENTS);

pub(super) const LONG_ABOUT: &str = "\
Measure the alert rules' false alarms and detection delays on generated data, through the real \
scoring, session and alert-evaluation code of the daemon. Nothing is asserted; the figures are \
printed (a human table, or --json). Timings are printed for information only.

What runs:
  A generated reference set (--ref-items items of about 25 invented words, the corpus generator \
of `mtgauge bench`) is loaded into a real server state with two sessions at the daemon's defaults \
(recent window of 1000 segments, 200 bootstrap replicates, BLEU with the default tokenizer): \
`production`, fed a stable system, and `candidate`, fed another stable system of the same quality \
and, in the trials, a degraded one after a switch. Both score the same randomly drawn item at \
each position. Every evaluation period the segments that arrived (--rate segments/s times the \
default 5 s period: 50 segments at the default 10/s) are scored by the sessions and applied as \
one batch with their replicate sums, and the daemon's own evaluator judges every rule; a rule's \
for-duration (default: 400 segments scored while the condition holds for below, 200 for drop; \
decline rules wait for nothing more than their test) is thus 8 or 4 evaluations at the default \
rate. below judges the recent window; drop, at its default, the last 1,800 segments of each \
session.
  The rules, all with default keys, each set for a drop of P points (--points, default 1,2): \
below (threshold = the stable system's BLEU minus P), drop (points = P, baseline session \
production), decline (points = P).
  Degraded systems: the stable system with a higher chance of replacing a word, calibrated by \
bisection to lose 1, 2 and 5 BLEU points (--drops) on --calibration-segments segments; the drop \
actually achieved is measured on an independent sample and printed.

What is measured:
  stable run: --segments segments (default 10,000,000) of the stable system, split over the \
threads as independent streams; false alerts = times a rule started firing, per million segments.
  trials: --trials per drop size (default 50); the switch falls after 14,000 to 18,000 stable \
segments; delay = segments from the switch to the first firing (a trial where the rule fired \
before the switch is left out and counted); trials watch at most --cap segments (default \
20,000) after the switch. Median and 90th percentile, a trial that never fired counting as longer \
than any delay (printed as 'never' when the percentile falls on one).
  fixed-window test: the candidate's corpus BLEU over consecutive, non-overlapping windows of n \
segments (n = 100 .. 20,000), alarm when a window is below a threshold. Per rule, the threshold \
is set on the same stable run to let exactly as many windows alarm as the rule fired (none when \
the rule never fired: then it is the lowest stable window's score); printed beside each rule: the \
window size with the smallest median delay, its delays, and its false alarms.

Runtime: the default run took 10 min 8 s of wall time on 2 cores shared with other builds, in a \
release build (calibration 48 s, stable run 308 s, trials 251 s; the trials start after 14,000 \
stable segments so that the decline rules' baseline is learned). The stable run scales with --segments (about 20 us of CPU \
per segment: both sessions' scoring and replicate sums, and the evaluations, 1 per 50 segments at \
the default rate); the trials with --trials and --cap. The figures depend only on the options, \
the seed and the number of threads (the stable run is one stream per thread). \
`--segments 1000000 --trials 20` takes about 2 minutes.";

/// Arguments of `mtgauge alert-bench`.
#[derive(Debug, Args)]
pub struct AlertBenchArgs {
    /// Segments of the stable run.
    #[arg(long, default_value_t = DEFAULT_STABLE_SEGMENTS, value_name = "N")]
    pub segments: u64,
    /// Trials per drop size.
    #[arg(long, default_value_t = DEFAULT_TRIALS, value_name = "N")]
    pub trials: usize,
    /// Drop sizes in BLEU points, comma-separated [default: 1,2,5].
    #[arg(long, value_delimiter = ',', value_name = "POINTS")]
    pub drops: Vec<f64>,
    /// The drops the rules are set for, comma-separated [default: 1,2].
    #[arg(long, value_delimiter = ',', value_name = "POINTS")]
    pub points: Vec<f64>,
    /// Segments per second the daemon receives (segments per evaluation = this x 5 s).
    #[arg(long, default_value_t = DEFAULT_RATE, value_name = "N")]
    pub rate: u64,
    /// Segments after the switch a trial watches at most.
    #[arg(long, default_value_t = DEFAULT_CAP, value_name = "N")]
    pub cap: u64,
    /// Items of the generated reference set.
    #[arg(long, default_value_t = DEFAULT_REF_ITEMS, value_name = "N")]
    pub ref_items: usize,
    /// Segments per calibration step of the degraded systems.
    #[arg(long, default_value_t = DEFAULT_CALIBRATION_SEGMENTS, value_name = "N")]
    pub calibration_segments: usize,
    /// Seed of everything generated.
    #[arg(long, default_value_t = DEFAULT_SEED)]
    pub seed: u64,
    /// Threads (default: the number of CPUs).
    #[arg(long, value_name = "N")]
    pub threads: Option<usize>,
    /// Print the figures as one JSON object.
    #[arg(long)]
    pub json: bool,
}

/// One degraded system.
#[derive(Debug, Clone, Serialize)]
struct Degraded {
    /// The drop asked for, BLEU points.
    target: f64,
    /// Extra chance of replacing a word, found by the calibration.
    extra_replace: f64,
    /// Stable minus degraded BLEU on an independent sample.
    measured_drop: f64,
    #[serde(skip)]
    noise: Noise,
}

/// One rule as benchmarked.
struct BenchRule {
    kind: &'static str,
    points: f64,
    toml: String,
}

fn rule_entries(points: &[f64], stable_bleu: f64) -> Vec<BenchRule> {
    let mut out = Vec::new();
    for kind in ["below", "drop", "decline"] {
        for &p in points {
            let name = format!("{kind}-{}", format!("{p}").replace('.', "_"));
            let condition = match kind {
                "below" => format!("when = \"below\"\nthreshold = {:.2}", stable_bleu - p),
                "drop" => format!("when = \"drop\"\nbaseline = \"{PRODUCTION}\"\npoints = {p}"),
                _ => format!("when = \"decline\"\npoints = {p}"),
            };
            out.push(BenchRule { kind, points: p, toml: format!("name = \"{name}\"\nsession = \"{CANDIDATE}\"\n{condition}") });
        }
    }
    out
}

/// A trial's outcome: per rule its watch, and per window size the windows after the switch.
struct Trial {
    drop: usize,
    watches: Vec<TrialWatch>,
    windows: Vec<Vec<(u64, f64)>>,
}

/// What the stable run found: per rule the firings, per window size the window scores.
struct StableRun {
    firings: Vec<u64>,
    windows: Vec<Vec<f64>>,
}

/// Settings shared by the phases.
struct Plan<'a> {
    systems: &'a Systems,
    rules: Arc<Vec<Rule>>,
    per_evaluation: u64,
    threads: usize,
    seed: u64,
    quiet: bool,
}

impl Plan<'_> {
    fn deployment(&self, stream: u64) -> Result<Deployment<'_>, CliError> {
        Deployment::new(self.systems, Arc::clone(&self.rules), DEFAULT_EVAL_SECONDS, &FIXED_WINDOWS, self.seed ^ stream).map_err(|e| CliError::Usage(e.to_string()))
    }

    fn log(&self, s: String) {
        if !self.quiet {
            eprintln!("{s}");
        }
    }

    /// The stable run, as `threads` independent streams of about `segments / threads` each.
    fn stable(&self, segments: u64) -> Result<StableRun, CliError> {
        let shards = (self.threads as u64).min(segments.max(1));
        let results: Vec<Result<StableRun, CliError>> = std::thread::scope(|sc| {
            let handles: Vec<_> = (0..shards)
                .map(|t| {
                    let size = segments / shards + u64::from(t < segments % shards);
                    sc.spawn(move || -> Result<StableRun, CliError> {
                        let mut d = self.deployment(t)?;
                        let mut rng = SplitMix64::new(self.seed ^ 0x5EED_0000 ^ t);
                        let mut run = StableRun { firings: vec![0; self.rules.len()], windows: vec![Vec::new(); FIXED_WINDOWS.len()] };
                        let mut next_report = size / 10;
                        while d.scored() < size {
                            let n = self.per_evaluation.min(size - d.scored()) as usize;
                            for (f, fired) in run.firings.iter_mut().zip(d.period(n, u64::MAX, CORPUS_NOISE, &mut rng)) {
                                *f += u64::from(fired);
                            }
                            for w in d.closed.drain(..) {
                                run.windows[w.size_index].push(w.bleu);
                            }
                            if t == 0 && d.scored() >= next_report && size >= 10 {
                                self.log(format!("  stable run: {}% of {} segments", 100 * d.scored() / size, size));
                                next_report += size / 10;
                            }
                        }
                        Ok(run)
                    })
                })
                .collect();
            handles.into_iter().map(|h| h.join().unwrap_or_else(|_| Err(CliError::Usage("a stable-run thread panicked".into())))).collect()
        });
        let mut all = StableRun { firings: vec![0; self.rules.len()], windows: vec![Vec::new(); FIXED_WINDOWS.len()] };
        for r in results {
            let r = r?;
            all.firings.iter_mut().zip(&r.firings).for_each(|(a, b)| *a += b);
            all.windows.iter_mut().zip(r.windows).for_each(|(a, b)| a.extend(b));
        }
        Ok(all)
    }

    /// `trials` trials per degraded system; a trial ends at the cap, or once every rule has
    /// settled and every window size has found the drop at its lowest threshold (`lowest`).
    fn trials(&self, degraded: &[Degraded], trials: usize, cap: u64, lowest: &[f64]) -> Result<Vec<Trial>, CliError> {
        let jobs: Vec<(usize, usize)> = (0..degraded.len()).flat_map(|d| (0..trials).map(move |t| (d, t))).collect();
        let next = AtomicUsize::new(0);
        let out = Mutex::new(Vec::with_capacity(jobs.len()));
        let done = AtomicUsize::new(0);
        let results: Vec<Result<(), CliError>> = std::thread::scope(|sc| {
            let handles: Vec<_> = (0..self.threads.min(jobs.len().max(1)))
                .map(|_| {
                    sc.spawn(|| -> Result<(), CliError> {
                        // The replay order is the same for every thread; each trial starts at a
                        // position of its own.
                        let mut d = self.deployment(0)?;
                        while let Some(&(di, t)) = jobs.get(next.fetch_add(1, Ordering::Relaxed)) {
                            let trial = self.trial(&mut d, di, t, &degraded[di], cap, lowest);
                            out.lock().unwrap_or_else(|e| e.into_inner()).push(trial);
                            let k = done.fetch_add(1, Ordering::Relaxed) + 1;
                            if k % (jobs.len() / 10).max(1) == 0 {
                                self.log(format!("  trials: {k} of {}", jobs.len()));
                            }
                        }
                        Ok(())
                    })
                })
                .collect();
            handles.into_iter().map(|h| h.join().unwrap_or_else(|_| Err(CliError::Usage("a trial thread panicked".into())))).collect()
        });
        results.into_iter().collect::<Result<(), _>>()?;
        let mut v = out.into_inner().unwrap_or_else(|e| e.into_inner());
        v.sort_by_key(|t| t.drop);
        Ok(v)
    }

    fn trial(&self, d: &mut Deployment<'_>, drop: usize, t: usize, degraded: &Degraded, cap: u64, lowest: &[f64]) -> Trial {
        let mut rng = SplitMix64::new(crate::metric::resample::mix64(self.seed ^ ((drop as u64) << 32 | t as u64)));
        d.restart(rng.index(self.systems.items()));
        let switch = WARMUP_SEGMENTS + rng.below(SWITCH_SPREAD);
        let mut watches = vec![TrialWatch::default(); self.rules.len()];
        let mut windows: Vec<Vec<(u64, f64)>> = vec![Vec::new(); FIXED_WINDOWS.len()];
        while d.scored() < switch + cap {
            let n = self.per_evaluation.min(switch + cap - d.scored()) as usize;
            let fired = d.period(n, switch, degraded.noise, &mut rng);
            for (w, f) in watches.iter_mut().zip(fired) {
                w.observe(d.scored(), switch, f);
            }
            for w in d.closed.drain(..).filter(|w| w.end > switch) {
                windows[w.size_index].push((w.end - switch, w.bleu));
            }
            let windows_done = windows.iter().zip(lowest).all(|(w, &c)| w.iter().any(|(_, s)| *s < c));
            if watches.iter().all(TrialWatch::settled) && windows_done {
                break;
            }
        }
        for w in &mut watches {
            w.delay = w.delay.filter(|&x| x <= cap);
        }
        Trial { drop, watches, windows }
    }
}

/// The fixed-window test beside one rule at one drop size.
#[derive(Debug, Clone, Serialize)]
struct WindowResult {
    window: u64,
    threshold: f64,
    stable_windows: usize,
    false_alarms: usize,
    delays: DelaySummary,
}

fn parse_list(given: &[f64], default: &[f64], what: &str) -> Result<Vec<f64>, CliError> {
    let v = if given.is_empty() { default.to_vec() } else { given.to_vec() };
    if v.iter().any(|x| !(x.is_finite() && *x > 0.0 && *x < 100.0)) {
        return Err(CliError::Usage(format!("--{what}: every value must be above 0 and below 100 BLEU points")));
    }
    Ok(v)
}

/// The best fixed window (smallest median delay, then 90th percentile, then size) of `all`.
fn best_window(all: &[WindowResult]) -> Option<&WindowResult> {
    let key = |w: &WindowResult| (w.delays.median.unwrap_or(u64::MAX), w.delays.p90.unwrap_or(u64::MAX), w.window);
    all.iter().min_by_key(|w| key(w))
}

pub(super) fn run(a: AlertBenchArgs) -> Result<(), CliError> {
    let drops = parse_list(&a.drops, &DEFAULT_DROPS, "drops")?;
    let points = parse_list(&a.points, &DEFAULT_RULE_POINTS, "points")?;
    if a.rate == 0 || a.calibration_segments == 0 || a.cap == 0 {
        return Err(CliError::Usage("--rate, --calibration-segments and --cap must be at least 1".into()));
    }
    if a.ref_items < DEFAULT_WINDOW {
        return Err(CliError::Usage(format!("--ref-items must be at least the recent window ({DEFAULT_WINDOW}), so that a window holds each item once")));
    }
    let threads = a.threads.unwrap_or_else(default_threads).max(1);
    let per_evaluation = a.rate * DEFAULT_EVAL_SECONDS;
    let started = Instant::now();
    let log = |s: String| {
        if !a.json {
            eprintln!("{s}");
        }
    };

    log(format!("generating {} reference items; calibrating {} degraded systems on {} segments", a.ref_items, drops.len(), a.calibration_segments));
    let systems = Systems::new(a.ref_items, DEFAULT_BENCH_TOKENS, DEFAULT_BENCH_VOCAB, a.seed);
    let compiled = systems.compile();
    let cal_seed = a.seed ^ 0xCA11;
    let stable_bleu = systems.corpus_bleu(&compiled, CORPUS_NOISE, a.calibration_segments, cal_seed);
    let check_stable = systems.corpus_bleu(&compiled, CORPUS_NOISE, a.calibration_segments, cal_seed + 1);
    let calibrated: Vec<Result<Degraded, CliError>> = std::thread::scope(|sc| {
        let handles: Vec<_> = drops
            .iter()
            .enumerate()
            .map(|(i, &target)| {
                let (systems, compiled) = (&systems, &compiled);
                sc.spawn(move || -> Result<Degraded, CliError> {
                    let extra = systems.calibrate(compiled, stable_bleu, target, a.calibration_segments, cal_seed).map_err(|e| CliError::Usage(e.to_string()))?;
                    let noise = CORPUS_NOISE.with_extra_replace(extra);
                    let measured_drop = check_stable - systems.corpus_bleu(compiled, noise, a.calibration_segments, cal_seed + 2 + i as u64);
                    Ok(Degraded { target, extra_replace: extra, measured_drop, noise })
                })
            })
            .collect();
        handles.into_iter().map(|h| h.join().unwrap_or_else(|_| Err(CliError::Usage("a calibration thread panicked".into())))).collect()
    });
    let degraded = calibrated.into_iter().collect::<Result<Vec<_>, _>>()?;
    let calibration_seconds = started.elapsed().as_secs_f64();

    let bench_rules = rule_entries(&points, stable_bleu);
    let entries = bench_rules.iter().map(|r| toml::from_str::<RuleEntry>(&r.toml)).collect::<Result<Vec<_>, _>>().map_err(|e| CliError::Usage(format!("internal rule text: {e}")))?;
    let rules = Arc::new(check_rules(&entries).map_err(|e| CliError::Usage(e.to_string()))?);
    let plan = Plan { systems: &systems, rules: Arc::clone(&rules), per_evaluation, threads, seed: a.seed, quiet: a.json };

    log(format!("stable run: {} segments on {threads} threads, {per_evaluation} segments per evaluation", a.segments));
    let t = Instant::now();
    let stable = plan.stable(a.segments)?;
    let stable_seconds = t.elapsed().as_secs_f64();

    // Per rule and window size, the threshold that lets the stable windows alarm as often as
    // the rule fired; the lowest per size decides when a trial may stop early.
    let thresholds: Vec<Vec<Option<f64>>> = stable.firings.iter().map(|&f| stable.windows.iter().map(|w| window_threshold(w, f as usize)).collect()).collect();
    let lowest: Vec<f64> = (0..FIXED_WINDOWS.len()).map(|i| thresholds.iter().filter_map(|t| t[i]).fold(f64::INFINITY, f64::min)).collect();

    log(format!("trials: {} per drop size, switch after {WARMUP_SEGMENTS} to {} stable segments, at most {} segments after it", a.trials, WARMUP_SEGMENTS + SWITCH_SPREAD, a.cap));
    let t = Instant::now();
    let trials = plan.trials(&degraded, a.trials, a.cap, &lowest)?;
    let trial_seconds = t.elapsed().as_secs_f64();

    let rule_figures: Vec<serde_json::Value> = rules
        .iter()
        .zip(&bench_rules)
        .enumerate()
        .map(|(ri, (rule, b))| {
            let by_drop: Vec<serde_json::Value> = degraded
                .iter()
                .enumerate()
                .map(|(di, dg)| {
                    let ts: Vec<&Trial> = trials.iter().filter(|t| t.drop == di).collect();
                    let watches: Vec<TrialWatch> = ts.iter().map(|t| t.watches[ri]).collect();
                    let fixed: Vec<WindowResult> = FIXED_WINDOWS
                        .iter()
                        .enumerate()
                        .filter_map(|(wi, &n)| {
                            let c = thresholds[ri][wi]?;
                            let delays: Vec<TrialWatch> = ts.iter().map(|t| TrialWatch { fired_before_switch: false, delay: window_delay(&t.windows[wi], c).filter(|&x| x <= a.cap) }).collect();
                            Some(WindowResult { window: n, threshold: c, stable_windows: stable.windows[wi].len(), false_alarms: window_alarms(&stable.windows[wi], c), delays: summarise(&delays) })
                        })
                        .collect();
                    json!({
                        "drop": dg.target,
                        "measured_drop": dg.measured_drop,
                        "rule": summarise(&watches),
                        "fixed_window_best": best_window(&fixed),
                        "fixed_window": fixed,
                    })
                })
                .collect();
            json!({
                "name": rule.name,
                "kind": b.kind,
                "points": b.points,
                "condition": rule.describe(),
                "config": b.toml,
                "stable": { "false_alerts": stable.firings[ri], "per_million_segments": per_million(stable.firings[ri], a.segments) },
                "drops": by_drop,
            })
        })
        .collect();

    let figures = json!({
        "settings": {
            "stable_segments": a.segments,
            "trials_per_drop": a.trials,
            "cap_segments": a.cap,
            "rate_segments_per_second": a.rate,
            "evaluation_seconds": DEFAULT_EVAL_SECONDS,
            "segments_per_evaluation": per_evaluation,
            "for_seconds": DEFAULT_FOR_SECONDS,
            "for_segments": DEFAULT_FOR_SEGMENTS,
            "drop_for_segments": DEFAULT_DROP_FOR_SEGMENTS,
            "drop_window_segments": DEFAULT_DROP_WINDOW_SEGMENTS,
            "decline_target_run_chunks": crate::alerts::shift::TARGET_RUN_CHUNKS,
            "decline_baseline_chunks": BASELINE_CHUNKS,
            "decline_lag_chunks": crate::alerts::shift::LAG_CHUNKS,
            "min_segments": DEFAULT_MIN_SEGMENTS,
            "recent_window": DEFAULT_WINDOW,
            "resamples": DAEMON_RESAMPLES,
            "warmup_segments": [WARMUP_SEGMENTS, WARMUP_SEGMENTS + SWITCH_SPREAD],
            "reference_items": a.ref_items,
            "mean_tokens": DEFAULT_BENCH_TOKENS,
            "vocabulary": DEFAULT_BENCH_VOCAB,
            "fixed_windows": FIXED_WINDOWS,
            "threads": threads,
            "seed": a.seed,
        },
        "systems": {
            "stable_bleu": stable_bleu,
            "stable_bleu_check_sample": check_stable,
            "calibration_segments": a.calibration_segments,
            "degraded": degraded,
        },
        "stable_windows": FIXED_WINDOWS.iter().zip(&stable.windows).map(|(n, w)| {
            let mean = w.iter().sum::<f64>() / w.len().max(1) as f64;
            let sd = (w.iter().map(|x| (x - mean) * (x - mean)).sum::<f64>() / w.len().saturating_sub(1).max(1) as f64).sqrt();
            json!({ "window": n, "count": w.len(), "mean_bleu": mean, "sd_bleu": sd })
        }).collect::<Vec<_>>(),
        "rules": rule_figures,
        "seconds": { "calibration": calibration_seconds, "stable_run": stable_seconds, "trials": trial_seconds, "total": started.elapsed().as_secs_f64() },
    });
    let out = if a.json { serde_json::to_string_pretty(&figures).unwrap_or_default() + "\n" } else { human(&figures) };
    std::io::stdout().write_all(out.as_bytes()).map_err(|e| CliError::Output { what: "standard output".into(), source: e })
}

fn delay_text(v: &serde_json::Value) -> String {
    v.as_u64().map_or_else(|| "never".to_string(), |x| x.to_string())
}

fn human(f: &serde_json::Value) -> String {
    let s = &f["settings"];
    let sy = &f["systems"];
    let num = |v: &serde_json::Value| v.as_f64().unwrap_or(f64::NAN);
    let mut o = format!(
        "mtgauge alert-bench: {} stable segments; {} trials per drop; {} segments/s, one evaluation every {} s = every {} segments; for-duration {} segments (below), {} (drop, over the last {} segments), {} s; decline: limit for an in-control run of {:e} chunks, baseline {} chunks, {} chunks old\n",
        s["stable_segments"], s["trials_per_drop"], s["rate_segments_per_second"], s["evaluation_seconds"], s["segments_per_evaluation"], s["for_segments"], s["drop_for_segments"], s["drop_window_segments"], s["for_seconds"], s["decline_target_run_chunks"].as_f64().unwrap_or(f64::NAN), s["decline_baseline_chunks"], s["decline_lag_chunks"]
    );
    o += &format!(
        "  sessions: recent window {}, {} replicates, BLEU; rules at their defaults (min_segments {}); reference set of {} generated items\n",
        s["recent_window"], s["resamples"], s["min_segments"], s["reference_items"]
    );
    o += &format!("  stable system: BLEU {:.2} (calibration sample), {:.2} (check sample)\n", num(&sy["stable_bleu"]), num(&sy["stable_bleu_check_sample"]));
    for d in sy["degraded"].as_array().into_iter().flatten() {
        o += &format!("  degraded by {} points: extra word-replacement chance {:.4}; measured drop {:.2} points\n", d["target"], num(&d["extra_replace"]), num(&d["measured_drop"]));
    }
    o += "  spread of the stable system's corpus BLEU over n segments (standard deviation over the stable run's windows):";
    for w in f["stable_windows"].as_array().into_iter().flatten() {
        if w["count"].as_u64().unwrap_or(0) > 1 {
            o += &format!(" n {} {:.2};", w["window"], num(&w["sd_bleu"]));
        }
    }
    o += "\n";
    o += "\n  delays in segments from the switch to the first firing: median / 90th percentile (detected of trials; left out: fired before the switch)\n";
    o += "  beside each: the fixed-window test with the same false alarms on the stable run, at its best window size n\n\n";
    o += &format!("  {:<12} {:>10} {:>9}  {:<6} {:>15} {:>12}   {:>6} {:>15} {:>10}\n", "rule", "false/10^6", "stable", "drop", "median / p90", "detected", "n", "median / p90", "window FA");
    for r in f["rules"].as_array().into_iter().flatten() {
        let st = &r["stable"];
        for (i, d) in r["drops"].as_array().into_iter().flatten().enumerate() {
            let (name, rate, fa) = if i == 0 { (r["name"].as_str().unwrap_or("").to_string(), format!("{:.2}", num(&st["per_million_segments"])), st["false_alerts"].to_string()) } else { (String::new(), String::new(), String::new()) };
            let rd = &d["rule"];
            let fw = &d["fixed_window_best"];
            o += &format!(
                "  {:<12} {:>10} {:>9}  {:<6} {:>15} {:>12}   {:>6} {:>15} {:>10}\n",
                name,
                rate,
                fa,
                format!("{:.1}", num(&d["drop"])),
                format!("{} / {}", delay_text(&rd["median"]), delay_text(&rd["p90"])),
                format!("{}/{}{}", rd["detected"], rd["trials"], if rd["fired_before_switch"].as_u64().unwrap_or(0) > 0 { format!(" (-{})", rd["fired_before_switch"]) } else { String::new() }),
                fw["window"].as_u64().map_or("-".into(), |n| n.to_string()),
                format!("{} / {}", delay_text(&fw["delays"]["median"]), delay_text(&fw["delays"]["p90"])),
                fw["false_alarms"].as_u64().map_or("-".into(), |n| n.to_string()),
            );
        }
    }
    o += "\n  conditions:\n";
    for r in f["rules"].as_array().into_iter().flatten() {
        o += &format!("    {:<12} {}\n", r["name"].as_str().unwrap_or(""), r["condition"].as_str().unwrap_or(""));
    }
    let sec = &f["seconds"];
    o += &format!(
        "\n  time (information only): calibration {:.1} s, stable run {:.1} s, trials {:.1} s, total {:.1} s on {} threads\n",
        num(&sec["calibration"]),
        num(&sec["stable_run"]),
        num(&sec["trials"]),
        num(&sec["total"]),
        s["threads"]
    );
    o
}
