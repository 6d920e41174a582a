//! Every score of a corpus or of one segment under a configuration, derived from the integer
//! statistics in one place. The renderers (JSON, the human view, the API, Prometheus gauges,
//! acknowledgements) all read their numbers from here, so a metric's formula is applied by the
//! same code whichever output shows it.

use serde::ser::{Serialize, SerializeMap, Serializer};

use super::{BleuScore, ChrfStats, CorpusStats, Metric, OrderCounts, ScoreConfig, SegmentStats};

/// Matched, hypothesis and reference n-grams per order 1..N.
#[derive(Debug, Clone, PartialEq, serde::Serialize)]
pub struct NgramCounts {
    /// Matched n-grams (the smaller of the hypothesis and reference counts, summed).
    pub matched: Vec<u64>,
    /// Hypothesis n-grams.
    pub candidates: Vec<u64>,
    /// Reference n-grams.
    pub reference: Vec<u64>,
}

impl NgramCounts {
    fn of(c: &OrderCounts, order: usize) -> NgramCounts {
        NgramCounts { matched: c.matches[..order].to_vec(), candidates: c.hyp[..order].to_vec(), reference: c.reference[..order].to_vec() }
    }
}

/// A chrF or chrF++ score with its parts.
#[derive(Debug, Clone, PartialEq, serde::Serialize)]
pub struct ChrfReport {
    /// Which metric (never BLEU); not written, it is the key the report sits under.
    #[serde(skip)]
    pub metric: Metric,
    /// chrF on a 0-100 scale.
    pub score: f64,
    /// Mean n-gram precision over the orders, 0-100.
    pub precision: f64,
    /// Mean n-gram recall over the orders, 0-100.
    pub recall: f64,
    /// Character n-gram counts.
    pub chars: NgramCounts,
    /// Word n-gram counts (metrics with word orders only).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub words: Option<NgramCounts>,
    /// Index (from 0) of the reference chosen for this segment (segment reports only).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub chosen: Option<u32>,
}

/// Every configured metric's score with its parts, for a corpus or one segment.
#[derive(Debug, Clone, PartialEq)]
pub struct Report {
    /// Segments behind the numbers.
    pub segments: u64,
    /// BLEU, when configured (at segment level: sentence BLEU, smoothed as configured).
    pub bleu: Option<BleuScore>,
    /// The chrF-family metrics configured, in output order.
    pub chrf: Vec<ChrfReport>,
}

fn chrf_stats(c: &CorpusStats, m: Metric) -> &ChrfStats {
    if m == Metric::ChrfPlusPlus {
        &c.chrfpp
    } else {
        &c.chrf
    }
}

fn chrf_report(m: Metric, st: &ChrfStats, config: &ScoreConfig, chosen: Option<u32>) -> Option<ChrfReport> {
    let p = config.chrf_params(m)?;
    let s = st.score(p.chars, p.words, p.beta);
    Some(ChrfReport {
        metric: m,
        score: s.score,
        precision: s.precision,
        recall: s.recall,
        chars: NgramCounts::of(&st.char, p.chars),
        words: (p.words > 0).then(|| NgramCounts::of(&st.word, p.words)),
        chosen,
    })
}

impl Report {
    /// The corpus scores of summed statistics.
    pub fn corpus(st: &CorpusStats, config: &ScoreConfig) -> Report {
        Report {
            segments: st.segments,
            bleu: config.metrics.bleu.map(|b| st.bleu.score(b.order)),
            chrf: config.chrf_family().filter_map(|(m, _)| chrf_report(m, chrf_stats(st, m), config, None)).collect(),
        }
    }

    /// The sentence-level scores of one segment.
    pub fn segment(s: &SegmentStats, config: &ScoreConfig) -> Report {
        let pick = |m: Metric| if m == Metric::ChrfPlusPlus { (&s.chrfpp, s.chrfpp_ref) } else { (&s.chrf, s.chrf_ref) };
        Report {
            segments: 1,
            bleu: config.metrics.bleu.map(|b| s.bleu.sentence(b.order, b.smoothing, b.epsilon)),
            chrf: config
                .chrf_family()
                .filter_map(|(m, _)| {
                    let (st, k) = pick(m);
                    chrf_report(m, st, config, Some(k))
                })
                .collect(),
        }
    }

    /// The score of `m` (0-100), when configured.
    pub fn score(&self, m: Metric) -> Option<f64> {
        match m {
            Metric::Bleu => self.bleu.as_ref().map(|b| b.score),
            m => self.chrf.iter().find(|c| c.metric == m).map(|c| c.score),
        }
    }

    /// Every configured metric with its score, in output order.
    pub fn scores(&self) -> impl Iterator<Item = (Metric, f64)> + '_ {
        let bleu = self.bleu.as_ref().map(|b| (Metric::Bleu, b.score));
        bleu.into_iter().chain(self.chrf.iter().map(|c| (c.metric, c.score)))
    }
}

/// `{"segments": N, "bleu": {...}, "chrf": {...}, "chrf++": {...}}`, configured metrics only.
impl Serialize for Report {
    fn serialize<S: Serializer>(&self, s: S) -> Result<S::Ok, S::Error> {
        let mut m = s.serialize_map(None)?;
        m.serialize_entry("segments", &self.segments)?;
        if let Some(b) = &self.bleu {
            m.serialize_entry(Metric::Bleu.name(), b)?;
        }
        for c in &self.chrf {
            m.serialize_entry(c.metric.name(), c)?;
        }
        m.end()
    }
}

/// The corpus score of `m` (0-100) without the parts, when configured: what gauges need.
pub fn corpus_score(st: &CorpusStats, config: &ScoreConfig, m: Metric) -> Option<f64> {
    match m {
        Metric::Bleu => config.metrics.bleu.map(|b| st.bleu.score(b.order).score),
        m => config.chrf_params(m).map(|p| chrf_stats(st, m).score(p.chars, p.words, p.beta).score),
    }
}

/// The sentence-level score of `m` (0-100) of one segment, when configured: what
/// acknowledgements carry.
pub fn segment_score(s: &SegmentStats, config: &ScoreConfig, m: Metric) -> Option<f64> {
    match m {
        Metric::Bleu => config.metrics.bleu.map(|b| s.bleu.sentence_score(b.order, b.smoothing, b.epsilon)),
        Metric::Chrf => config.metrics.chrf.map(|p| s.chrf.score(p.chars, p.words, p.beta).score),
        Metric::ChrfPlusPlus => config.metrics.chrfpp.map(|p| s.chrfpp.score(p.chars, p.words, p.beta).score),
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::metric::MetricSpec;
    use crate::text::Tokenizer;

    fn config(specs: &[&str]) -> ScoreConfig {
        ScoreConfig::new(Tokenizer::Whitespace, false, specs.iter().map(|s| s.parse::<MetricSpec>().unwrap())).unwrap()
    }

    #[test]
    fn reports_agree_with_the_one_score_functions() {
        let mut st = CorpusStats { segments: 2, ..Default::default() };
        st.bleu.matches[..4].copy_from_slice(&[8, 5, 3, 2]);
        st.bleu.totals[..4].copy_from_slice(&[10, 8, 6, 4]);
        (st.bleu.hyp_len, st.bleu.ref_len) = (10, 12);
        st.chrf.char.matches[..2].copy_from_slice(&[5, 3]);
        st.chrf.char.hyp[..2].copy_from_slice(&[6, 5]);
        st.chrf.char.reference[..2].copy_from_slice(&[7, 6]);
        st.chrfpp = st.chrf;
        st.chrfpp.word.matches[0] = 1;
        st.chrfpp.word.hyp[0] = 2;
        st.chrfpp.word.reference[0] = 2;
        let c = config(&["bleu", "chrf:chars=2", "chrf++:chars=2,words=1,beta=1"]);
        let r = Report::corpus(&st, &c);
        for m in Metric::ALL {
            assert_eq!(r.score(m), corpus_score(&st, &c, m), "{m}");
        }
        // chrF++ with beta 1 by hand: P = (5/6 + 3/5 + 1/2) / 3, R = (5/7 + 3/6 + 1/2) / 3.
        let (p, rc) = ((5.0 / 6.0 + 0.6 + 0.5) / 3.0, (5.0 / 7.0 + 0.5 + 0.5) / 3.0);
        assert!((r.score(Metric::ChrfPlusPlus).unwrap() - 100.0 * 2.0 * p * rc / (p + rc)).abs() < 1e-12);
        let j = serde_json::to_value(&r).unwrap();
        let keys: Vec<&str> = j.as_object().unwrap().keys().map(String::as_str).collect();
        assert_eq!(keys, ["segments", "bleu", "chrf", "chrf++"]);
        assert_eq!(j["bleu"]["matched"], serde_json::json!([8, 5, 3, 2]));
        assert_eq!(j["bleu"]["tokens"]["reference"], 12);
        assert_eq!(j["chrf++"]["words"]["candidates"], serde_json::json!([2]));
        assert!(j["chrf"].get("words").is_none() && j["chrf"].get("chosen").is_none());
    }

    #[test]
    fn segment_reports_carry_the_chosen_reference_and_the_smoothed_score() {
        let mut s = SegmentStats { chrf_ref: 1, ..Default::default() };
        s.bleu.matches[..4].copy_from_slice(&[3, 1, 0, 0]);
        s.bleu.totals[..4].copy_from_slice(&[5, 4, 3, 2]);
        (s.bleu.hyp_len, s.bleu.ref_len) = (5, 5);
        let c = config(&["bleu:smoothing=plus-one", "chrf"]);
        let r = Report::segment(&s, &c);
        assert_eq!(r.score(Metric::Bleu), segment_score(&s, &c, Metric::Bleu));
        assert!(r.score(Metric::Bleu).unwrap() > 0.0, "plus-one smoothing lifts a sentence without 3-gram matches");
        assert_eq!(r.bleu.as_ref().unwrap().precision, vec![60.0, 25.0, 0.0, 0.0]);
        assert_eq!(r.chrf[0].chosen, Some(1));
        assert_eq!(r.score(Metric::ChrfPlusPlus), None);
    }
}
