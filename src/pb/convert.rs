//! Conversions between the API messages and the engine's types. The scores in a
//! [`super::Totals`] come from [`crate::metric::scores`], like every other output's.

use crate::metric::resample::{Interval, Replicates, Resampling};
use crate::metric::scores::{NgramCounts, Report};
use crate::metric::{BleuParams, ChrfParams, CorpusStats, Metric, MetricSpec, OrderCounts, ScoreConfig, SegmentStats};
use crate::pb;

/// A message that does not describe a valid value; the text names the field.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
#[error("{0}")]
pub struct ConvertError(pub String);

/// The metric spec of one API entry, unset parameters at their defaults. `at` names the entry
/// in errors.
fn spec_from_pb(m: &pb::MetricConfig, at: &str) -> Result<MetricSpec, ConvertError> {
    let bad = |e: String| ConvertError(format!("{at}: {e}"));
    let metric: Metric = m.name.parse().map_err(|e: crate::metric::ConfigError| bad(e.to_string()))?;
    let mut spec = MetricSpec::default_for(metric);
    let foreign: &[(&str, bool)] = match metric {
        Metric::Bleu => &[("chars", m.chars != 0), ("words", m.words != 0), ("beta", m.beta != 0.0)],
        _ => &[("order", m.order != 0), ("ref_length", !m.ref_length.is_empty()), ("smoothing", !m.smoothing.is_empty()), ("epsilon", m.epsilon != 0.0)],
    };
    if let Some((key, _)) = foreign.iter().find(|(_, set)| *set) {
        return Err(bad(format!("{key} is not a parameter of {metric} (its parameters: {})", metric.keys().join(", ").replace('-', "_"))));
    }
    let set = |spec: &mut MetricSpec, key: &str, value: String| spec.set(key, &value).map_err(|e| bad(e.to_string()));
    match metric {
        Metric::Bleu => {
            if m.order != 0 {
                set(&mut spec, "order", m.order.to_string())?;
            }
            if !m.ref_length.is_empty() {
                set(&mut spec, "ref-length", m.ref_length.clone())?;
            }
            if !m.smoothing.is_empty() {
                set(&mut spec, "smoothing", m.smoothing.clone())?;
            }
            if m.epsilon != 0.0 {
                set(&mut spec, "epsilon", m.epsilon.to_string())?;
            }
        }
        _ => {
            if m.chars != 0 {
                set(&mut spec, "chars", m.chars.to_string())?;
            }
            if m.words != 0 {
                set(&mut spec, "words", m.words.to_string())?;
            }
            if m.beta != 0.0 {
                set(&mut spec, "beta", m.beta.to_string())?;
            }
        }
    }
    spec.validate().map_err(|e| bad(e.to_string()))?;
    Ok(spec)
}

/// An API configuration with defaults filled in, validated.
pub fn config_from_pb(c: Option<&pb::ScoreConfig>) -> Result<ScoreConfig, ConvertError> {
    let Some(c) = c else { return Ok(ScoreConfig::default()) };
    let tokenizer = if c.tokenizer.is_empty() {
        crate::text::DEFAULT_TOKENIZER
    } else {
        c.tokenizer.parse().map_err(|e: crate::text::UnknownTokenizer| ConvertError(format!("config.tokenizer: {e}")))?
    };
    let specs = c.metrics.iter().enumerate().map(|(i, m)| spec_from_pb(m, &format!("config.metrics[{i}]"))).collect::<Result<Vec<_>, _>>()?;
    ScoreConfig::new(tokenizer, c.caseless, specs).map_err(|e| ConvertError(format!("config: {e}")))
}

/// The configuration as sent back to clients (every default filled in).
pub fn config_to_pb(c: &ScoreConfig) -> pb::ScoreConfig {
    let metric = |s: MetricSpec| match s {
        MetricSpec::Bleu(BleuParams { order, ref_length, smoothing, epsilon }) => pb::MetricConfig {
            name: s.metric().name().to_owned(),
            order: order as u32,
            ref_length: ref_length.to_string(),
            smoothing: smoothing.to_string(),
            epsilon,
            ..Default::default()
        },
        MetricSpec::Chrf(m, ChrfParams { chars, words, beta }) => {
            pb::MetricConfig { name: m.name().to_owned(), chars: chars as u32, words: words as u32, beta, ..Default::default() }
        }
    };
    pb::ScoreConfig { tokenizer: c.tokenizer.to_string(), caseless: c.caseless, metrics: c.specs().map(metric).collect() }
}

fn counts_to_pb(c: NgramCounts) -> pb::NgramCounts {
    pb::NgramCounts { matched: c.matched, candidates: c.candidates, reference: c.reference }
}

/// Statistics of the configured metrics with the scores derived from them.
pub fn totals_to_pb(st: &CorpusStats, c: &ScoreConfig) -> pb::Totals {
    let r = Report::corpus(st, c);
    pb::Totals {
        segments: r.segments,
        bleu: r.bleu.map(|b| pb::BleuResult {
            score: b.score,
            matched: b.matched,
            candidates: b.candidates,
            precision: b.precision,
            tokens: Some(pb::TokenCounts { hypothesis: b.tokens.hypothesis, reference: b.tokens.reference, ratio: b.tokens.ratio }),
            brevity: b.brevity,
            interval: None,
        }),
        chrf: r
            .chrf
            .into_iter()
            .map(|x| pb::ChrfResult {
                metric: x.metric.name().to_owned(),
                score: x.score,
                precision: x.precision,
                recall: x.recall,
                chars: Some(counts_to_pb(x.chars)),
                words: x.words.map(counts_to_pb),
                interval: None,
            })
            .collect(),
        external: Vec::new(),
    }
}

/// [`totals_to_pb`] with each configured score's interval at `level` from `reps` (when given
/// and not empty).
pub fn totals_with_intervals(st: &CorpusStats, c: &ScoreConfig, reps: Option<&Replicates>, level: f64) -> pb::Totals {
    let mut t = totals_to_pb(st, c);
    let Some(reps) = reps else { return t };
    let of = |m: Metric| reps.interval(m, level).map(interval_to_pb);
    if let Some(b) = &mut t.bleu {
        b.interval = of(Metric::Bleu);
    }
    for x in &mut t.chrf {
        x.interval = Metric::ALL.into_iter().find(|m| m.name() == x.metric).and_then(of);
    }
    t
}

/// Replicate sums in an API message.
pub fn replicate_sums_to_pb(r: &Replicates) -> pb::ReplicateSums {
    pb::ReplicateSums { resamples: r.resamples() as u32, seed: r.seed(), sums: r.sums().to_vec() }
}

/// Replicate sums from an API message, for a configuration (None: they do not fit its layout).
pub fn replicate_sums_from_pb(p: &pb::ReplicateSums, config: &ScoreConfig) -> Option<Replicates> {
    Replicates::from_sums(config, p.resamples as usize, p.seed, p.sums.clone())
}

/// An interval in an API message.
pub fn interval_to_pb(i: Interval) -> pb::Interval {
    pb::Interval { level: i.level, low: i.low, high: i.high, resamples: i.resamples as u32, method: i.method.to_owned(), seed: i.seed }
}

/// An interval from an API message (the method as this version names it).
pub fn interval_from_pb(i: &pb::Interval) -> Interval {
    Interval { level: i.level, low: i.low, high: i.high, resamples: i.resamples as usize, method: crate::metric::resample::METHOD, seed: i.seed }
}

/// The interval of `m` in an API message, when present.
pub fn interval_of(t: &pb::Totals, m: Metric) -> Option<Interval> {
    let i = match m {
        Metric::Bleu => t.bleu.as_ref()?.interval.as_ref(),
        m => t.chrf.iter().find(|c| c.metric == m.name())?.interval.as_ref(),
    };
    i.map(interval_from_pb)
}

/// A session's resampling, every default filled in.
pub fn resampling_to_pb(r: &Resampling) -> pb::Resampling {
    pb::Resampling { resamples: Some(r.resamples as u32), seed: Some(r.seed) }
}

/// The resampling a request asks for (unset fields: the defaults).
pub fn resampling_from_pb(r: Option<&pb::Resampling>) -> Resampling {
    let d = Resampling::default();
    Resampling { resamples: r.and_then(|r| r.resamples).map_or(d.resamples, |n| n as usize), seed: r.and_then(|r| r.seed).unwrap_or(d.seed) }
}

/// Sentence-level scores of one segment, keyed by metric name (for acknowledgements).
pub fn segment_scores_to_pb(s: &SegmentStats, c: &ScoreConfig) -> std::collections::HashMap<String, f64> {
    c.metric_list().filter_map(|m| crate::metric::scores::segment_score(s, c, m).map(|v| (m.name().to_owned(), v))).collect()
}

/// The score of `m` in an API message, when present.
pub fn score_of(t: &pb::Totals, m: Metric) -> Option<f64> {
    match m {
        Metric::Bleu => t.bleu.as_ref().map(|b| b.score),
        m => t.chrf.iter().find(|c| c.metric == m.name()).map(|c| c.score),
    }
}

fn copy(src: &[u64], dst: &mut [u64]) {
    dst.iter_mut().zip(src).for_each(|(d, s)| *d = *s);
}

fn orders_from_pb(c: Option<&pb::NgramCounts>, out: &mut OrderCounts) {
    let Some(c) = c else { return };
    copy(&c.matched, &mut out.matches);
    copy(&c.candidates, &mut out.hyp);
    copy(&c.reference, &mut out.reference);
}

/// The integer statistics of an API message back in the engine's type (for clients that
/// render them, and for adding up replicas); the scores in it are ignored.
pub fn stats_from_pb(p: &pb::Totals) -> CorpusStats {
    let mut st = CorpusStats { segments: p.segments, ..Default::default() };
    if let Some(b) = &p.bleu {
        copy(&b.matched, &mut st.bleu.matches);
        copy(&b.candidates, &mut st.bleu.totals);
        if let Some(t) = &b.tokens {
            (st.bleu.hyp_len, st.bleu.ref_len) = (t.hypothesis, t.reference);
        }
    }
    for c in &p.chrf {
        let dst = match c.metric.as_str() {
            "chrf" => &mut st.chrf,
            "chrf++" => &mut st.chrfpp,
            _ => continue,
        };
        orders_from_pb(c.chars.as_ref(), &mut dst.char);
        orders_from_pb(c.words.as_ref(), &mut dst.word);
    }
    st
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn configurations_round_trip_and_foreign_parameters_are_refused() {
        let c: ScoreConfig = "tokenizer=whitespace caseless=yes bleu:order=3,epsilon=0.05 chrf++:chars=4,words=1,beta=1".parse().unwrap();
        assert_eq!(config_from_pb(Some(&config_to_pb(&c))).unwrap(), c);
        assert_eq!(config_from_pb(None).unwrap(), ScoreConfig::default());
        assert_eq!(config_from_pb(Some(&pb::ScoreConfig::default())).unwrap(), ScoreConfig::default());
        let m = |name: &str| pb::MetricConfig { name: name.into(), ..Default::default() };
        let bad = pb::ScoreConfig { metrics: vec![m("bleu"), pb::MetricConfig { chars: 3, ..m("bleu") }], ..Default::default() };
        let e = config_from_pb(Some(&bad)).unwrap_err().to_string();
        assert_eq!(e, "config.metrics[1]: chars is not a parameter of bleu (its parameters: order, ref_length, smoothing, epsilon)");
        let twice = pb::ScoreConfig { metrics: vec![m("chrf"), m("chrf")], ..Default::default() };
        assert!(config_from_pb(Some(&twice)).unwrap_err().to_string().contains("named twice"));
        let eps = pb::ScoreConfig { metrics: vec![pb::MetricConfig { epsilon: 0.05, ..m("bleu") }], ..Default::default() };
        assert_eq!(config_from_pb(Some(&eps)).unwrap().metrics.bleu.unwrap().epsilon, 0.05, "epsilon reaches the session");
    }

    #[test]
    fn totals_carry_the_statistics_back() {
        let c: ScoreConfig = "bleu:order=2 chrf:chars=2,words=1 chrf++:chars=1,words=1".parse().unwrap();
        let mut st = CorpusStats { segments: 3, ..Default::default() };
        st.bleu.matches[..2].copy_from_slice(&[4, 2]);
        st.bleu.totals[..2].copy_from_slice(&[5, 4]);
        (st.bleu.hyp_len, st.bleu.ref_len) = (5, 6);
        st.chrf.char.matches[..2].copy_from_slice(&[3, 1]);
        st.chrf.char.hyp[..2].copy_from_slice(&[4, 3]);
        st.chrf.char.reference[..2].copy_from_slice(&[5, 4]);
        st.chrf.word.matches[0] = 1;
        st.chrfpp.char.matches[0] = 2;
        st.chrfpp.word.hyp[0] = 2;
        let t = totals_to_pb(&st, &c);
        assert_eq!(stats_from_pb(&t), st);
        assert_eq!(t.chrf.iter().map(|x| x.metric.as_str()).collect::<Vec<_>>(), ["chrf", "chrf++"]);
        assert_eq!(Some(t.bleu.unwrap().score), crate::metric::scores::corpus_score(&st, &c, Metric::Bleu));
    }
}

/// Guard counts as the API's tally.
pub fn guard_tally_to_pb(c: &crate::guard::GuardCounts) -> pb::GuardTally {
    let per = |f: fn(&crate::guard::GuardCounts, crate::guard::Guard) -> u64| crate::guard::Guard::ALL.iter().map(|&g| (g.name().to_owned(), f(c, g))).collect();
    pb::GuardTally { checked: c.checked, flagged: per(crate::guard::GuardCounts::flagged_by), undecided: per(crate::guard::GuardCounts::undecided_by) }
}

/// The API's tally as guard counts (unknown guard names are ignored).
pub fn guard_tally_from_pb(t: &pb::GuardTally) -> crate::guard::GuardCounts {
    let mut c = crate::guard::GuardCounts { checked: t.checked, ..Default::default() };
    for g in crate::guard::Guard::ALL {
        c.flagged[g as usize] = t.flagged.get(g.name()).copied().unwrap_or(0);
        c.undecided[g as usize] = t.undecided.get(g.name()).copied().unwrap_or(0);
    }
    c
}

/// What a session's guards took from its reference set, in the API.
pub fn guard_setup_to_pb(s: &crate::guard::GuardSetup) -> pb::GuardSetup {
    let (words, why) = match &s.vocabulary {
        Ok(words) => (*words as u64, String::new()),
        Err(why) => (0, why.clone()),
    };
    pb::GuardSetup { length_ratio: s.length_ratio, length_ratio_from: s.length_ratio_from.name().to_owned(), vocabulary_words: words, no_vocabulary_because: why }
}

/// The API's guard setup; None when the server sent none or an origin this client does not
/// know.
pub fn guard_setup_from_pb(s: &pb::GuardSetup) -> Option<crate::guard::GuardSetup> {
    let length_ratio_from = crate::guard::RatioFrom::from_name(&s.length_ratio_from)?;
    let vocabulary = if s.no_vocabulary_because.is_empty() { Ok(s.vocabulary_words as usize) } else { Err(s.no_vocabulary_because.clone()) };
    Some(crate::guard::GuardSetup { length_ratio: s.length_ratio, length_ratio_from, vocabulary })
}

/// One item's verdict in the API.
pub fn guard_verdict_to_pb(index: u32, v: crate::guard::Verdict) -> pb::GuardVerdict {
    pb::GuardVerdict {
        index,
        flagged: v.flagged_guards().map(|g| g.name().to_owned()).collect(),
        undecided: v.undecided_guards().map(|g| g.name().to_owned()).collect(),
    }
}

/// Each metric's comparison in an API message.
pub fn metric_comparisons_to_pb(c: &crate::metric::compare::Comparison) -> Vec<pb::MetricComparison> {
    c.metrics
        .iter()
        .map(|m| pb::MetricComparison {
            metric: m.metric.name().to_owned(),
            a: m.a.score,
            b: m.b.score,
            a_interval: m.a.interval.map(interval_to_pb),
            b_interval: m.b.interval.map(interval_to_pb),
            difference: m.difference,
            interval: m.interval.map(interval_to_pb),
            p_value: m.p_value,
            trials: m.trials as u64,
            extreme_trials: m.extreme_trials as u64,
        })
        .collect()
}
