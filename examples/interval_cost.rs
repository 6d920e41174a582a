//! What bootstrap replicates cost on top of scoring: segments/s of the Compiled scoring loop on
//! one thread, alone and with each segment also added to R replicate sums (as a session would
//! add it). Figures only; nothing is asserted.
//!
//! `cargo run --release --example interval_cost [-- SEGMENTS [METRICS]]`

use std::sync::atomic::AtomicUsize;
use std::sync::Arc;
use std::time::Instant;

use mtgauge::metric::resample::{fill_weights, segment_key, Replicates, DAEMON_RESAMPLES, DEFAULT_RESAMPLE_SEED, OFFLINE_RESAMPLES};
use mtgauge::metric::{ScoreConfig, SegmentStats};
use mtgauge::refs::compiled::{Compiled, Scratch};
use mtgauge::refs::{RefSet, SegmentInput};
use mtgauge::rng::SplitMix64;

/// Segments unless given.
const DEFAULT_SEGMENTS: usize = 20_000;
/// Invented vocabulary size and mean segment length in tokens.
const VOCAB: u64 = 20_000;
const MEAN_TOKENS: u32 = 25;
/// Timed passes per variant; the fastest counts.
const PASSES: usize = 5;

fn word(mut k: u64) -> String {
    const SYL: [&str; 16] = ["ka", "lo", "mi", "nu", "pe", "ra", "su", "ti", "vo", "ze", "bri", "dol", "fen", "gat", "hus", "jor"];
    let mut w = String::new();
    loop {
        w += SYL[(k % 16) as usize];
        k /= 16;
        if k == 0 {
            return w;
        }
    }
}

fn main() {
    let mut args = std::env::args().skip(1);
    let n: usize = args.next().and_then(|a| a.parse().ok()).unwrap_or(DEFAULT_SEGMENTS);
    let metrics = args.next().unwrap_or_else(|| "bleu chrf".into());
    let config: ScoreConfig = metrics.parse().expect("metrics");
    let mut rng = SplitMix64::new(7);
    let mut segs = Vec::new();
    let mut hyps = Vec::new();
    for i in 0..n {
        let len = rng.in_range((MEAN_TOKENS / 2, MEAN_TOKENS * 3 / 2)) as usize;
        let r: Vec<String> = (0..len).map(|_| word(rng.below(VOCAB))).collect();
        let h: Vec<String> = r.iter().map(|w| if rng.chance(0.3) { word(rng.below(VOCAB)) } else { w.clone() }).collect();
        segs.push(SegmentInput { id: (i + 1).to_string(), source: None, refs: vec![r.join(" ")] });
        hyps.push(h.join(" "));
    }
    let refs = Arc::new(RefSet::new(segs).expect("refset"));
    let keys: Vec<u64> = refs.segments().map(|s| segment_key(s.id().as_bytes())).collect();
    let compiled = Compiled::build(Arc::clone(&refs), config);
    let hyps: Vec<&str> = hyps.iter().map(String::as_str).collect();

    let best = |f: &mut dyn FnMut()| (0..PASSES).map(|_| {
        let t = Instant::now();
        f();
        t.elapsed().as_secs_f64()
    }).fold(f64::INFINITY, f64::min);
    let mut sink = 0u64;
    let alone = best(&mut || {
        let mut s = Scratch::default();
        let mut one = SegmentStats::default();
        for (i, h) in hyps.iter().enumerate() {
            compiled.score_segment_into(i, h, &mut s, &mut one);
            sink = sink.wrapping_add(one.bleu.hyp_len);
        }
    });
    let corpus = best(&mut || {
        sink = sink.wrapping_add(compiled.score_corpus(&hyps, 1, &AtomicUsize::new(0)).segments);
    });
    println!("{n} segments, metrics {metrics}, one thread, best of {PASSES}");
    println!("  scoring alone (per segment)   {:>10.0} segments/s", n as f64 / alone);
    println!("  scoring alone (corpus loop)   {:>10.0} segments/s", n as f64 / corpus);
    for r in [DAEMON_RESAMPLES, OFFLINE_RESAMPLES] {
        let with = best(&mut || {
            let mut s = Scratch::default();
            let mut one = SegmentStats::default();
            let mut reps = Replicates::new(&config, r, DEFAULT_RESAMPLE_SEED);
            for (i, h) in hyps.iter().enumerate() {
                compiled.score_segment_into(i, h, &mut s, &mut one);
                reps.add(keys[i], &one);
            }
            sink = sink.wrapping_add(reps.replicate(0).segments);
        });
        println!(
            "  with {r:>4} replicates            {:>10.0} segments/s  ({:.2}x the time of scoring alone; replicates alone {:.1} us/segment)",
            n as f64 / with,
            with / alone,
            (with - alone) / n as f64 * 1e6
        );
    }
    for r in [DAEMON_RESAMPLES, OFFLINE_RESAMPLES] {
        let mut w = vec![0u8; r];
        let t = best(&mut || {
            for &k in &keys {
                fill_weights(k, DEFAULT_RESAMPLE_SEED, &mut w);
                sink = sink.wrapping_add(u64::from(w[r - 1]));
            }
        });
        println!("  of which weights for {r:>4}       {:>10.1} us/segment", t / n as f64 * 1e6);
    }
    println!("  (checksum {sink})");
}
