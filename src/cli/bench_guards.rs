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
pub(super) const PASSES: usize = 8;
/// Measurements of each loop; the fastest counts.
const ROUNDS: usize = 3;

/// The fastest of [`ROUNDS`] runs of `f`, in seconds.
pub(super) fn fastest(mut f: impl FnMut() -> u64) -> f64 {
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

/// Both language identifiers on the demo scenario's texts (German hypotheses, English sources):
/// microseconds per text and the share of texts each names correctly (whatlang's also the
/// share it calls reliable, and the share both reliable and correct).
pub(super) fn identifier_figures() -> Value {
    let segs = demo_segments();
    let german: Vec<String> = demo_systems().into_iter().flat_map(|sys| sys.hypotheses).collect();
    let english: Vec<String> = segs.iter().map(|s| s.source_text().to_owned()).collect();
    let mut out = serde_json::Map::new();
    for (name, texts, thorough, quick) in [("german_hypotheses", &german, whatlang::Lang::Deu, whichlang::Lang::Deu), ("english_sources", &english, whatlang::Lang::Eng, whichlang::Lang::Eng)] {
        let n = texts.len() as f64;
        let (mut right, mut reliable, mut reliable_right, mut quick_right) = (0usize, 0usize, 0usize, 0usize);
        for t in texts.iter() {
            let info = whatlang::detect(t);
            let ok = info.as_ref().is_some_and(|i| i.lang() == thorough);
            let sure = info.as_ref().is_some_and(|i| i.is_reliable());
            right += usize::from(ok);
            reliable += usize::from(sure);
            reliable_right += usize::from(ok && sure);
            quick_right += usize::from(whichlang::detect_language(t) == quick);
        }
        let thorough_time = fastest(|| texts.iter().map(|t| whatlang::detect(t).map_or(0, |i| i.lang() as u64)).sum());
        let quick_time = fastest(|| texts.iter().map(|t| whichlang::detect_language(t) as u64).sum());
        out.insert(
            name.to_owned(),
            json!({
                "texts": texts.len(),
                "mean_chars": texts.iter().map(|t| t.chars().count()).sum::<usize>() as f64 / n,
                "whatlang_0_18_0": { "us_per_text": 1e6 * thorough_time / n, "correct": right as f64 / n, "reliable": reliable as f64 / n, "reliable_and_correct": reliable_right as f64 / n },
                "whichlang_0_1_1": { "us_per_text": 1e6 * quick_time / n, "correct": quick_right as f64 / n },
            }),
        );
    }
    Value::Object(out)
}

/// The human lines of [`identifier_figures`].
pub(super) fn identifier_lines(f: &Value) -> String {
    let mut s = String::new();
    for (name, what) in [("german_hypotheses", "German hypotheses"), ("english_sources", "English sources")] {
        let g = &f[name];
        let n = |a: &str, b: &str| g[a][b].as_f64().unwrap_or(f64::NAN);
        s += &format!(
            "  language identifiers on the demo's {} {what} ({:.0} characters on average): whatlang 0.18.0 {:.2} us/text, {:.1}% correct ({:.1}% reliable and correct); whichlang 0.1.1 {:.2} us/text, {:.1}% correct\n",
            g["texts"],
            g["mean_chars"].as_f64().unwrap_or(f64::NAN),
            n("whatlang_0_18_0", "us_per_text"),
            100.0 * n("whatlang_0_18_0", "correct"),
            100.0 * n("whatlang_0_18_0", "reliable_and_correct"),
            n("whichlang_0_1_1", "us_per_text"),
            100.0 * n("whichlang_0_1_1", "correct"),
        );
    }
    s
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
