//! Conversions between the API messages and the engine's types.

use super::error::{Result, ServiceError};
use crate::metric::{ChrfStats, CorpusStats, MetricSet, OrderCounts, RefLength, ScoreConfig, Smoothing};
use crate::pb;
use crate::text::Tokenizer;

/// An API configuration with defaults filled in, validated.
pub fn config_from_pb(c: Option<&pb::ScoreConfig>) -> Result<ScoreConfig> {
    let mut out = ScoreConfig::default();
    let Some(c) = c else { return Ok(out) };
    let bad = |what: &str, e: String| ServiceError::Invalid(format!("config.{what}: {e}"));
    if !c.metrics.is_empty() {
        out.metrics = c.metrics.join(",").parse::<MetricSet>().map_err(|e| bad("metrics", e.to_string()))?;
    }
    if !c.tokenizer.is_empty() {
        out.tokenizer = c.tokenizer.parse::<Tokenizer>().map_err(|e| bad("tokenizer", e.to_string()))?;
    }
    out.lowercase = c.lowercase;
    if c.bleu_order != 0 {
        out.bleu_order = c.bleu_order as usize;
    }
    if !c.ref_length.is_empty() {
        out.ref_length = c.ref_length.parse::<RefLength>().map_err(|e| bad("ref_length", e.to_string()))?;
    }
    if !c.smoothing.is_empty() {
        out.smoothing = c.smoothing.parse::<Smoothing>().map_err(|e| bad("smoothing", e.to_string()))?;
    }
    if c.chrf_char_order != 0 {
        out.chrf_char_order = c.chrf_char_order as usize;
    }
    if c.chrf_word_order != 0 {
        out.chrf_word_order = c.chrf_word_order as usize;
    }
    if c.chrf_beta != 0.0 {
        out.beta = c.chrf_beta;
    }
    out.validate().map_err(|e| ServiceError::Invalid(format!("config: {e}")))?;
    Ok(out)
}

/// The configuration as sent back to clients (every default filled in).
pub fn config_to_pb(c: &ScoreConfig) -> pb::ScoreConfig {
    pb::ScoreConfig {
        metrics: c.metrics.iter().map(|m| m.name().to_owned()).collect(),
        tokenizer: c.tokenizer.to_string(),
        lowercase: c.lowercase,
        bleu_order: c.bleu_order as u32,
        ref_length: c.ref_length.to_string(),
        smoothing: c.smoothing.to_string(),
        chrf_char_order: c.chrf_char_order as u32,
        chrf_word_order: c.chrf_word_order as u32,
        chrf_beta: c.beta,
    }
}

fn orders(c: &OrderCounts, n: usize) -> pb::ChrfOrderCounts {
    pb::ChrfOrderCounts { matches: c.matches[..n].to_vec(), hyp: c.hyp[..n].to_vec(), r#ref: c.reference[..n].to_vec() }
}

fn chrf(st: &ChrfStats, c: usize, w: usize) -> pb::ChrfStats {
    pb::ChrfStats { chars: Some(orders(&st.char, c)), words: Some(orders(&st.word, w)) }
}

/// Statistics of the configured metrics.
pub fn stats_to_pb(st: &CorpusStats, c: &ScoreConfig) -> pb::CorpusStats {
    pb::CorpusStats {
        segments: st.segments,
        bleu: c.metrics.bleu.then(|| pb::BleuStats {
            matches: st.bleu.matches[..c.bleu_order].to_vec(),
            totals: st.bleu.totals[..c.bleu_order].to_vec(),
            hyp_length: st.bleu.hyp_len,
            ref_length: st.bleu.ref_len,
        }),
        chrf: c.metrics.chrf.then(|| chrf(&st.chrf, c.chrf_char_order, 0)),
        chrfpp: c.metrics.chrfpp.then(|| chrf(&st.chrfpp, c.chrf_char_order, c.chrf_word_order)),
    }
}

/// Scores derived from statistics.
pub fn scores_to_pb(st: &CorpusStats, c: &ScoreConfig) -> pb::Scores {
    let bleu = c.metrics.bleu.then(|| st.bleu.score(c.bleu_order));
    pb::Scores {
        segments: st.segments,
        bleu: bleu.as_ref().map(|b| b.score),
        bleu_precisions: bleu.as_ref().map(|b| b.precisions.clone()).unwrap_or_default(),
        brevity_penalty: bleu.as_ref().map(|b| b.brevity_penalty),
        chrf: c.metrics.chrf.then(|| st.chrf.score(c.chrf_char_order, 0, c.beta).score),
        chrfpp: c.metrics.chrfpp.then(|| st.chrfpp.score(c.chrf_char_order, c.chrf_word_order, c.beta).score),
    }
}

fn orders_from_pb(c: Option<&pb::ChrfOrderCounts>, out: &mut OrderCounts) {
    let Some(c) = c else { return };
    let copy = |src: &[u64], dst: &mut [u64]| dst.iter_mut().zip(src).for_each(|(d, s)| *d = *s);
    copy(&c.matches, &mut out.matches);
    copy(&c.hyp, &mut out.hyp);
    copy(&c.r#ref, &mut out.reference);
}

/// Statistics from the API back into the engine's type (for clients that render them).
pub fn stats_from_pb(p: &pb::CorpusStats) -> CorpusStats {
    let mut st = CorpusStats { segments: p.segments, ..Default::default() };
    if let Some(b) = &p.bleu {
        b.matches.iter().zip(st.bleu.matches.iter_mut()).for_each(|(s, d)| *d = *s);
        b.totals.iter().zip(st.bleu.totals.iter_mut()).for_each(|(s, d)| *d = *s);
        st.bleu.hyp_len = b.hyp_length;
        st.bleu.ref_len = b.ref_length;
    }
    if let Some(c) = &p.chrf {
        orders_from_pb(c.chars.as_ref(), &mut st.chrf.char);
        orders_from_pb(c.words.as_ref(), &mut st.chrf.word);
    }
    if let Some(c) = &p.chrfpp {
        orders_from_pb(c.chars.as_ref(), &mut st.chrfpp.char);
        orders_from_pb(c.words.as_ref(), &mut st.chrfpp.word);
    }
    st
}
