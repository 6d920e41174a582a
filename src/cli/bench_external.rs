//! `bench`'s cost of external segment metrics: the 1-thread BLEU scoring loop over the demo
//! scenario's items, alone and with every item also carrying two external values that are
//! checked, converted to fixed point and added, with the daemon's 200 bootstrap replicates keyed
//! by the item, as a session does with the values of a batch (the work done outside any lock).

use std::sync::Arc;

use serde_json::{json, Value};

use super::demo::scenario::{demo_segments, demo_systems};
use crate::external::{Declaration, ExternalDelta, ExternalSpec};
use crate::metric::resample::{DAEMON_RESAMPLES, DEFAULT_RESAMPLE_SEED};
use crate::metric::{MetricSpec, ScoreConfig, SegmentStats};
use crate::refs::compiled::{Compiled, Scratch};
use crate::refs::RefSet;
use crate::text::DEFAULT_TOKENIZER;

use super::bench_guards::{fastest, PASSES};

/// Items per batch, as the values are added (one delta per batch).
const BATCH: usize = 64;

/// The figures: segments/s of BLEU alone, of BLEU with two external values per item (without
/// and with replicates), and the time the values add per item.
pub(super) fn external_cost() -> Value {
    let config = ScoreConfig::new(DEFAULT_TOKENIZER, false, ["bleu".parse::<MetricSpec>().expect("fixed metric")]).expect("fixed configuration");
    let Ok(set) = RefSet::new(demo_segments()) else { return Value::Null };
    let compiled = Compiled::build(Arc::new(set), config);
    let items: Vec<(usize, String)> = demo_systems().into_iter().flat_map(|sys| sys.hypotheses.into_iter().enumerate()).collect();
    let specs = [ExternalSpec::new("qe", 0.0, 1.0), ExternalSpec::new("edit_rate", 0.0, 100.0).map(|s| ExternalSpec { higher_is_better: false, decimals: 2, ..s })];
    let Ok(decl) = specs.into_iter().collect::<Result<Vec<_>, _>>().map_err(|e| e.to_string()).and_then(|v| Declaration::new(v).map_err(|e| e.to_string())) else { return Value::Null };
    // Values as a producer sends them: a QE score with four decimals, an edit rate with one.
    let values: Vec<(f64, f64)> = (0..items.len()).map(|i| ((i * 7919 % 10_000) as f64 / 10_000.0, (i * 104_729 % 1000) as f64 / 10.0)).collect();
    let run = |external: bool, replicates: bool| {
        fastest(|| {
            let (mut scratch, mut one) = (Scratch::default(), SegmentStats::default());
            let mut sink = 0u64;
            let mut batch = Vec::with_capacity(BATCH);
            for _ in 0..PASSES {
                for (k, ((i, h), (qe, rate))) in items.iter().zip(&values).enumerate() {
                    compiled.score_segment_into(*i, h, &mut scratch, &mut one);
                    sink = sink.wrapping_add(one.bleu.hyp_len);
                    if !external {
                        continue;
                    }
                    if let Ok(v) = decl.check_item([("qe", *qe), ("edit_rate", *rate)]) {
                        batch.push((k as u64, v));
                    }
                    if batch.len() == BATCH {
                        let resampling = replicates.then_some((DAEMON_RESAMPLES, DEFAULT_RESAMPLE_SEED));
                        if let Ok(d) = ExternalDelta::of(decl.len(), resampling, &batch) {
                            sink = sink.wrapping_add(d.totals.0[0].count);
                        }
                        batch.clear();
                    }
                }
            }
            sink
        })
    };
    let n = (PASSES * items.len()) as f64;
    let alone = run(false, false);
    let with = run(true, false);
    let with_reps = run(true, true);
    json!({
        "items": items.len(),
        "passes": PASSES,
        "metrics": 2,
        "resamples": DAEMON_RESAMPLES,
        "bleu_segments_per_s": n / alone,
        "bleu_with_external_segments_per_s": n / with,
        "bleu_with_external_and_replicates_segments_per_s": n / with_reps,
        "added_us_per_item": 1e6 * (with - alone) / n,
        "added_us_per_item_with_replicates": 1e6 * (with_reps - alone) / n,
        "added_time_ratio_with_replicates": with_reps / alone - 1.0,
    })
}

/// The human line of [`external_cost`]'s figures.
pub(super) fn external_cost_line(g: &Value) -> String {
    let n = |k: &str| g[k].as_f64().unwrap_or(f64::NAN);
    format!(
        "  external metrics ({} demo items x {}, 2 values an item, 1 thread): BLEU alone {:.0} segments/s; with the values checked and summed {:.0} segments/s (+{:.3} us an item); with {} replicates too {:.0} segments/s (+{:.3} us an item, +{:.0}% time)\n",
        g["items"],
        g["passes"],
        n("bleu_segments_per_s"),
        n("bleu_with_external_segments_per_s"),
        n("added_us_per_item"),
        g["resamples"],
        n("bleu_with_external_and_replicates_segments_per_s"),
        n("added_us_per_item_with_replicates"),
        100.0 * n("added_time_ratio_with_replicates"),
    )
}
