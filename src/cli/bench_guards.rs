//! `bench`'s cost of the reference-free guards: the 1-thread BLEU scoring loop of a session
//! over the demo scenario's (English source, German hypothesis) pairs, alone and with every item
//! also checked by the guards, as a daemon session does with items whose segment has a source.

use std::sync::Arc;
use std::time::Instant;

use serde_json::{json, Value};

use super::demo::scenario::{demo_segments, demo_systems};
use crate::guard::GuardScratch;
use crate::metric::{MetricSpec, ScoreConfig};
use crate::refs::compiled::Scratch;
use crate::refs::RefSet;
use crate::session::{ItemKey, Outcome, Session, SessionSpec};
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

/// [`PASSES`] passes over the items as the daemon takes a batch of them (by segment id, in
/// batches of `mtgauge send`'s default size): each batch scored, then its items checked by the
/// guards when `guards`.
fn passes(session: &Session, items: &[(String, String)], guards: bool) -> u64 {
    let (mut scratch, mut g) = (Scratch::default(), GuardScratch::default());
    let mut outcomes = Vec::with_capacity(super::send::DEFAULT_BATCH);
    let mut sink = 0u64;
    for _ in 0..PASSES {
        for batch in items.chunks(super::send::DEFAULT_BATCH) {
            outcomes.clear();
            for (id, h) in batch {
                let outcome = session.score_item(ItemKey::Id(id), h, &mut scratch);
                if let Outcome::Scored { stats, .. } = &outcome {
                    sink = sink.wrapping_add(stats.bleu.hyp_len);
                }
                outcomes.push(outcome);
            }
            if guards {
                for ((id, h), o) in batch.iter().zip(&outcomes) {
                    sink = sink.wrapping_add(session.guard_item(ItemKey::Id(id), o, h, &mut g).map_or(0, |v| u64::from(v.flagged)));
                }
            }
        }
    }
    sink
}

/// [`PASSES`] passes of the guards alone over items already scored.
fn guard_passes(session: &Session, items: &[(String, String)], outcomes: &[Outcome]) -> u64 {
    let mut g = GuardScratch::default();
    let mut sink = 0u64;
    for _ in 0..PASSES {
        for ((id, h), o) in items.iter().zip(outcomes) {
            sink = sink.wrapping_add(session.guard_item(ItemKey::Id(id), o, h, &mut g).map_or(0, |v| u64::from(v.flagged)));
        }
    }
    sink
}

/// A BLEU session over the demo set with German declared as its target and `settings`.
fn demo_session(settings: &[&str]) -> Option<Session> {
    let config = ScoreConfig::new(DEFAULT_TOKENIZER, false, ["bleu".parse::<MetricSpec>().ok()?]).ok()?;
    let set = RefSet::new(demo_segments()).ok()?;
    let spec = SessionSpec {
        name: "bench".into(),
        refset: "demo".into(),
        config,
        labels: Default::default(),
        window: 1,
        resampling: Default::default(),
        target_language: Some("de".into()),
        guard_settings: settings.iter().map(|s| s.to_string()).collect(),
        external: Default::default(),
    };
    Some(Session::new(spec, Arc::new(set), 0))
}

/// The figures: segments/s of BLEU alone (a session's scoring of items named by segment id),
/// of the guards alone, and of BLEU with the guards: all of them, without the vocabulary screen
/// (`language-vocab-share=off`: every item's language goes to the identifiers) and without
/// language identification (`language-id=off`, which keeps the script check); and the time the
/// guards add to BLEU scoring per segment.
pub(super) fn guard_cost() -> Value {
    let (Some(all), Some(no_vocab), Some(no_lang)) = (demo_session(&[]), demo_session(&["language-vocab-share=off"]), demo_session(&["language-id=off"])) else { return Value::Null };
    let ids: Vec<String> = all.refs().segments().map(|s| s.id().to_owned()).collect();
    let items: Vec<(String, String)> = demo_systems().into_iter().flat_map(|sys| ids.iter().cloned().zip(sys.hypotheses).collect::<Vec<_>>()).collect();
    let mut scratch = Scratch::default();
    let outcomes: Vec<Outcome> = items.iter().map(|(id, h)| all.score_item(ItemKey::Id(id), h, &mut scratch)).collect();
    let n = (PASSES * items.len()) as f64;
    let alone = fastest(|| passes(&all, &items, false));
    let guards_only = fastest(|| guard_passes(&all, &items, &outcomes));
    let both = fastest(|| passes(&all, &items, true));
    let both_no_vocab = fastest(|| passes(&no_vocab, &items, true));
    let both_no_lang = fastest(|| passes(&no_lang, &items, true));
    json!({
        "items": items.len(),
        "passes": PASSES,
        "metrics": all.spec().config.describe(),
        "vocabulary_words": all.guard_config().vocabulary.as_ref().map_or(0, |v| v.len()),
        "scan": crate::guard::scan_path(),
        "bleu_segments_per_s": n / alone,
        "guards_segments_per_s": n / guards_only,
        "bleu_with_guards_segments_per_s": n / both,
        "bleu_with_guards_without_vocabulary_segments_per_s": n / both_no_vocab,
        "bleu_with_guards_without_language_id_segments_per_s": n / both_no_lang,
        "added_time_ratio": both / alone - 1.0,
        "added_time_ratio_without_vocabulary": both_no_vocab / alone - 1.0,
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
        "  guards ({} demo items x {}, 1 thread, German target, vocabulary of {} words, {} scan): BLEU alone {:.0} segments/s, with all guards {:.0} segments/s (+{:.0}% time; guards alone {:.0}/s); without the vocabulary screen {:.0} segments/s (+{:.0}%); without language identification {:.0} segments/s (+{:.0}%)\n",
        g["items"],
        g["passes"],
        g["vocabulary_words"],
        g["scan"].as_str().unwrap_or("?"),
        n("bleu_segments_per_s"),
        n("bleu_with_guards_segments_per_s"),
        100.0 * n("added_time_ratio"),
        n("guards_segments_per_s"),
        n("bleu_with_guards_without_vocabulary_segments_per_s"),
        100.0 * n("added_time_ratio_without_vocabulary"),
        n("bleu_with_guards_without_language_id_segments_per_s"),
        100.0 * n("added_time_ratio_without_language_id")
    )
}
