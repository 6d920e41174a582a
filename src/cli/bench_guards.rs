//! `bench`'s cost of the reference-free guards: the 1-thread BLEU scoring loop over the demo
//! scenario's (English source, German hypothesis) pairs, alone and with every item also checked
//! by the guards, as a daemon session does with items that carry a source.

use std::sync::Arc;
use std::time::Instant;

use serde_json::{json, Value};

use super::demo::scenario::{demo_segments, demo_systems};
use crate::guard::{check, GuardConfig, GuardScratch, LengthTally};
use crate::metric::{MetricSpec, ScoreConfig, SegmentStats};
use crate::refs::compiled::{Compiled, Scratch};
use crate::refs::RefSet;
use crate::text::DEFAULT_TOKENIZER;

/// Passes over the demo items per measurement (900 items each).
const PASSES: usize = 8;
/// Measurements of each loop; the fastest counts.
const ROUNDS: usize = 3;

fn fastest(mut f: impl FnMut() -> u64) -> f64 {
    let mut best = f64::INFINITY;
    let mut sink = 0u64;
    for _ in 0..ROUNDS {
        let t = Instant::now();
        sink = sink.wrapping_add(f());
        best = best.min(t.elapsed().as_secs_f64());
    }
    std::hint::black_box(sink);
    best
}

/// [`PASSES`] passes over the items: BLEU-scored when `score`, checked by `guards` when given.
fn passes(compiled: &Compiled, items: &[(usize, String)], sources: &[String], guards: Option<&GuardConfig>, score: bool) -> u64 {
    let (mut scratch, mut one, mut g) = (Scratch::default(), SegmentStats::default(), GuardScratch::default());
    let mut sink = 0u64;
    for _ in 0..PASSES {
        for (i, h) in items {
            if score {
                compiled.score_segment_into(*i, h, &mut scratch, &mut one);
                sink = sink.wrapping_add(one.bleu.hyp_len);
            }
            if let Some(c) = guards {
                sink = sink.wrapping_add(u64::from(check(c, &sources[*i], h, &mut g).flagged));
            }
        }
    }
    sink
}

/// The figures: segments/s of BLEU alone, guards alone (with and without the language
/// identifier: `language-id=off`), and BLEU with the guards, and the time the guards add to
/// BLEU scoring per segment.
pub(super) fn guard_cost() -> Value {
    let segs = demo_segments();
    let config = ScoreConfig::new(DEFAULT_TOKENIZER, false, ["bleu".parse::<MetricSpec>().expect("fixed metric")]).expect("fixed configuration");
    let mut tally = LengthTally::default();
    for s in &segs {
        for r in &s.refs {
            tally.add(s.source_text(), r);
        }
    }
    let sources: Vec<String> = segs.iter().map(|s| s.source_text().to_owned()).collect();
    let Ok(set) = RefSet::new(segs) else { return Value::Null };
    let compiled = Compiled::build(Arc::new(set), config);
    let items: Vec<(usize, String)> = demo_systems().into_iter().flat_map(|sys| sys.hypotheses.into_iter().enumerate()).collect();
    let mut with_target = GuardConfig::default().with_target("de").unwrap_or_default();
    with_target.length_ratio = tally.ratio(with_target.length_min_chars).unwrap_or(with_target.length_ratio);
    let no_target = GuardConfig { language_id: false, ..with_target.clone() };

    let run = |guards: Option<&GuardConfig>, score: bool| fastest(|| passes(&compiled, &items, &sources, guards, score));
    let n = (PASSES * items.len()) as f64;
    let alone = run(None, true);
    let guards_only = run(Some(&with_target), false);
    let guards_no_lang = run(Some(&no_target), false);
    let both = run(Some(&with_target), true);
    let both_no_lang = run(Some(&no_target), true);
    json!({
        "items": items.len(),
        "passes": PASSES,
        "metrics": config.describe(),
        "bleu_segments_per_s": n / alone,
        "guards_segments_per_s": n / guards_only,
        "guards_without_language_id_segments_per_s": n / guards_no_lang,
        "bleu_with_guards_segments_per_s": n / both,
        "bleu_with_guards_without_language_id_segments_per_s": n / both_no_lang,
        "added_time_ratio": both / alone - 1.0,
        "added_time_ratio_without_language_id": both_no_lang / alone - 1.0,
    })
}

/// The human line of [`guard_cost`]'s figures.
pub(super) fn guard_cost_line(g: &Value) -> String {
    let n = |k: &str| g[k].as_f64().unwrap_or(f64::NAN);
    format!(
        "  guards ({} demo items x {}, 1 thread): BLEU alone {:.0} segments/s, with all guards {:.0} segments/s (+{:.0}% time; guards alone {:.0}/s); without language identification {:.0} segments/s (+{:.0}%)\n",
        g["items"],
        g["passes"],
        n("bleu_segments_per_s"),
        n("bleu_with_guards_segments_per_s"),
        100.0 * n("added_time_ratio"),
        n("guards_segments_per_s"),
        n("bleu_with_guards_without_language_id_segments_per_s"),
        100.0 * n("added_time_ratio_without_language_id")
    )
}
