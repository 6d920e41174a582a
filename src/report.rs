//! Reports: scores derived from statistics at read time, with the configuration that produced
//! them, as JSON (`score --json`, `status --json`) and as a compact human table.

use serde_json::{json, Map, Value};

use crate::metric::{CorpusStats, Metric, OrderCounts, ScoreConfig, SegmentStats};
use crate::refs::RefSet;

/// Printed with every report: what the numbers are and are not.
pub const PROXY_NOTE: &str = "Automatic metrics are a proxy for translation quality; scores are comparable only under the same tokenizer, references and configuration.";

/// The configuration as JSON, with the program version.
pub fn config_json(config: &ScoreConfig) -> Value {
    let mut v = serde_json::to_value(config).unwrap_or(Value::Null);
    if let Value::Object(m) = &mut v {
        m.insert("version".into(), json!(env!("CARGO_PKG_VERSION")));
    }
    v
}

/// The reference set's identity as JSON.
pub fn refset_json(name: Option<&str>, refs: &RefSet) -> Value {
    json!({
        "name": name,
        "digest": refs.digest_hex(),
        "segments": refs.len(),
        "references": refs.reference_count(),
    })
}

fn orders_json(c: &OrderCounts, order: usize) -> Value {
    json!({ "matches": &c.matches[..order], "hyp": &c.hyp[..order], "ref": &c.reference[..order] })
}

/// Corpus statistics and the scores derived from them, one key per configured metric.
pub fn stats_json(stats: &CorpusStats, config: &ScoreConfig) -> Map<String, Value> {
    let mut m = Map::new();
    m.insert("segments".into(), json!(stats.segments));
    for metric in config.metrics.iter() {
        let v = match metric {
            Metric::Bleu => serde_json::to_value(stats.bleu.score(config.bleu_order)).unwrap_or(Value::Null),
            Metric::Chrf => {
                let s = stats.chrf.score(config.chrf_char_order, 0, config.beta);
                json!({
                    "score": s.score, "precision": s.precision, "recall": s.recall, "beta": config.beta,
                    "char": orders_json(&stats.chrf.char, config.chrf_char_order),
                })
            }
            Metric::ChrfPlusPlus => {
                let s = stats.chrfpp.score(config.chrf_char_order, config.chrf_word_order, config.beta);
                json!({
                    "score": s.score, "precision": s.precision, "recall": s.recall, "beta": config.beta,
                    "char": orders_json(&stats.chrfpp.char, config.chrf_char_order),
                    "word": orders_json(&stats.chrfpp.word, config.chrf_word_order),
                })
            }
        };
        m.insert(metric.name().into(), v);
    }
    m
}

/// One segment's statistics with its sentence-level scores (BLEU smoothed as configured).
pub fn segment_json(id: &str, s: &SegmentStats, config: &ScoreConfig) -> Value {
    let mut m = Map::new();
    m.insert("id".into(), json!(id));
    let o = config.bleu_order;
    for metric in config.metrics.iter() {
        let v = match metric {
            Metric::Bleu => json!({
                "score": s.bleu.sentence_score(o, config.smoothing, config.epsilon),
                "matches": &s.bleu.matches[..o], "totals": &s.bleu.totals[..o],
                "hyp_length": s.bleu.hyp_len, "ref_length": s.bleu.ref_len,
            }),
            Metric::Chrf => json!({
                "score": s.chrf.score(config.chrf_char_order, 0, config.beta).score,
                "ref": s.chrf_ref,
                "char": orders_json(&s.chrf.char, config.chrf_char_order),
            }),
            Metric::ChrfPlusPlus => json!({
                "score": s.chrfpp.score(config.chrf_char_order, config.chrf_word_order, config.beta).score,
                "ref": s.chrfpp_ref,
                "char": orders_json(&s.chrfpp.char, config.chrf_char_order),
                "word": orders_json(&s.chrfpp.word, config.chrf_word_order),
            }),
        };
        m.insert(metric.name().into(), v);
    }
    Value::Object(m)
}

/// Human lines for corpus statistics (no trailing newline), each starting with `indent`.
pub fn stats_lines(stats: &CorpusStats, config: &ScoreConfig, indent: &str) -> Vec<String> {
    let mut out = Vec::new();
    for metric in config.metrics.iter() {
        match metric {
            Metric::Bleu => {
                let b = stats.bleu.score(config.bleu_order);
                let p: Vec<String> = b.precisions.iter().map(|p| format!("{p:.1}")).collect();
                out.push(format!(
                    "{indent}BLEU    {:6.2}   n-gram precision {}   brevity {:.3} (hyp {} / ref {} tokens)",
                    b.score,
                    p.join(" / "),
                    b.brevity_penalty,
                    b.hyp_length,
                    b.ref_length
                ));
            }
            Metric::Chrf => {
                let c = stats.chrf.score(config.chrf_char_order, 0, config.beta);
                out.push(format!(
                    "{indent}chrF    {:6.2}   precision {:.1}   recall {:.1}   (character 1-{}, beta {})",
                    c.score, c.precision, c.recall, config.chrf_char_order, config.beta
                ));
            }
            Metric::ChrfPlusPlus => {
                let c = stats.chrfpp.score(config.chrf_char_order, config.chrf_word_order, config.beta);
                out.push(format!(
                    "{indent}chrF++  {:6.2}   precision {:.1}   recall {:.1}   (character 1-{}, word 1-{}, beta {})",
                    c.score, c.precision, c.recall, config.chrf_char_order, config.chrf_word_order, config.beta
                ));
            }
        }
    }
    out
}
