//! Renderings of scores, shared by the commands: JSON (`score --json`, `--per-segment`,
//! `status --json`, `compare --json`) and the human view (`score`, `compare`, `status`, the
//! demo). The numbers themselves come from [`crate::metric::scores`] and
//! [`crate::metric::compare`].

use serde_json::{json, Map, Value};

use crate::guard::{Guard, GuardCounts, GuardSetup, Verdict};
use crate::metric::compare::{self, CompareSettings, Comparison};
use crate::metric::resample::{Replicates, METHOD};
use crate::metric::scores::Report;
use crate::metric::{BleuScore, CorpusStats, ScoreConfig, SegmentStats};
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
pub fn refset_json(name: Option<&str>, refs: &RefSetSummary) -> Value {
    json!({
        "name": name,
        "digest": crate::refs::hex(&refs.digest),
        "segments": refs.segments,
        "references": refs.references,
    })
}

/// What a report says of a reference set: its digest and size.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct RefSetSummary {
    /// [`RefSet::digest`].
    pub digest: [u8; 32],
    /// Segments.
    pub segments: usize,
    /// References over all segments.
    pub references: usize,
}

impl From<&RefSet> for RefSetSummary {
    fn from(r: &RefSet) -> Self {
        RefSetSummary { digest: r.digest(), segments: r.len(), references: r.reference_count() }
    }
}

fn object(r: &Report) -> Map<String, Value> {
    match serde_json::to_value(r) {
        Ok(Value::Object(m)) => m,
        _ => Map::new(),
    }
}

/// Corpus statistics and the scores derived from them: `segments` and one key per configured
/// metric.
pub fn stats_json(stats: &CorpusStats, config: &ScoreConfig) -> Map<String, Value> {
    object(&Report::corpus(stats, config))
}

/// One segment's statistics with its sentence-level scores (BLEU smoothed as configured).
pub fn segment_json(id: &str, s: &SegmentStats, config: &ScoreConfig) -> Value {
    let mut m = Map::new();
    m.insert("id".into(), json!(id));
    let mut rest = object(&Report::segment(s, config));
    rest.shift_remove("segments");
    m.extend(rest);
    Value::Object(m)
}

/// Right-aligned cells of equal width, after a row title.
fn row(indent: &str, title: &str, cells: &[String], width: usize) -> String {
    let mut line = format!("{indent}  {title:<11}");
    for c in cells {
        line += &format!("{c:>width$}");
    }
    line
}

/// The BLEU block: the score, then a table with one column per n-gram order (clipped matches,
/// hypothesis n-grams, precision), then the brevity penalty with its token counts.
fn bleu_lines(b: &BleuScore, indent: &str, out: &mut Vec<String>) {
    out.push(format!("{indent}{:<8}{:>6.2}", "BLEU", b.score));
    let counts = |v: &[u64]| v.iter().map(u64::to_string).collect::<Vec<_>>();
    let (orders, matched, candidates) = ((1..=b.matched.len()).map(|n| format!("{n}-gram")).collect::<Vec<_>>(), counts(&b.matched), counts(&b.candidates));
    let precision: Vec<String> = b.precision.iter().map(|p| format!("{p:.1}%")).collect();
    let width = 2 + [&orders, &matched, &candidates, &precision].iter().flat_map(|v| v.iter()).map(String::len).max().unwrap_or(0);
    out.push(row(indent, "", &orders, width));
    out.push(row(indent, "matched", &matched, width));
    out.push(row(indent, "candidates", &candidates, width));
    out.push(row(indent, "precision", &precision, width));
    out.push(format!(
        "{indent}  {:<11}{:.4}  from {} hypothesis against {} reference tokens (ratio {:.3})",
        "brevity", b.brevity, b.tokens.hypothesis, b.tokens.reference, b.tokens.ratio
    ));
}

/// Human lines for corpus statistics (no trailing newline), each starting with `indent`.
pub fn stats_lines(stats: &CorpusStats, config: &ScoreConfig, indent: &str) -> Vec<String> {
    let r = Report::corpus(stats, config);
    let mut out = Vec::new();
    if let Some(b) = &r.bleu {
        bleu_lines(b, indent, &mut out);
    }
    for c in &r.chrf {
        let Some(p) = config.chrf_params(c.metric) else { continue };
        let words = if p.words > 0 { format!(" + word 1..{}", p.words) } else { String::new() };
        out.push(format!(
            "{indent}{:<8}{:>6.2}   over char 1..{}{words} n-grams, beta {}: mean precision {:.1}%, mean recall {:.1}%",
            c.metric.title(),
            c.score,
            p.chars,
            p.beta,
            c.precision,
            c.recall
        ));
    }
    out
}

/// What an interval was asked for with: replicates, seed of the weights, level.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct IntervalSettings {
    /// Replicates (at least 1).
    pub resamples: usize,
    /// Seed of the replicate weights.
    pub seed: u64,
    /// Confidence level, strictly between 0 and 1.
    pub level: f64,
}

impl IntervalSettings {
    /// The settings as JSON, for the `config` object (what reproduces the interval).
    pub fn json(&self) -> Value {
        json!({"level": self.level, "resamples": self.resamples, "method": METHOD, "seed": self.seed})
    }
}

/// Add `interval` to each configured metric's object in `scores` (as made by [`stats_json`])
/// and the settings to `config` (as made by [`config_json`]).
pub fn intervals_json(scores: &mut Map<String, Value>, config: &mut Value, reps: &Replicates, set: &IntervalSettings) {
    for m in reps.config().metric_list() {
        if let (Some(Value::Object(o)), Some(i)) = (scores.get_mut(m.name()), reps.interval(m, set.level)) {
            o.insert("interval".into(), serde_json::to_value(i).unwrap_or(Value::Null));
        }
    }
    if let Value::Object(c) = config {
        c.insert("interval".into(), set.json());
    }
}

/// Human lines of the intervals: a heading with the method and settings, then one line per
/// metric with its range.
pub fn interval_lines(reps: &Replicates, set: &IntervalSettings, indent: &str) -> Vec<String> {
    let mut out = vec![format!(
        "{indent}{}% intervals (percentile, Poisson bootstrap over segments, {} resamples, seed {})",
        (100.0 * set.level * 1e6).round() / 1e6,
        set.resamples,
        set.seed
    )];
    for m in reps.config().metric_list() {
        if let Some(i) = reps.interval(m, set.level) {
            out.push(format!("{indent}  {:<8}{:>6.2} .. {:.2}", m.title(), i.low, i.high));
        }
    }
    out
}

/// The settings of a comparison as JSON, for the `config` object (what reproduces the interval
/// and the p-value).
pub fn compare_settings_json(s: &CompareSettings) -> Value {
    json!({
        "level": s.level,
        "resamples": s.resamples,
        "interval_method": compare::DIFFERENCE_METHOD,
        "seed": s.seed,
        "trials": s.trials,
        "test": compare::TEST_METHOD,
        "tie_tolerance": compare::TIE_TOLERANCE,
    })
}

/// A comparison as JSON: `segments`, then one object per configured metric (keyed like
/// [`stats_json`]) with `a`, `b` (score and own interval), `difference` (a - b), `interval` (of
/// the difference), `p_value`, `trials`, `extreme_trials` and `segments`.
pub fn comparison_json(c: &Comparison) -> Map<String, Value> {
    let mut m = Map::new();
    m.insert("segments".into(), json!(c.segments));
    for x in &c.metrics {
        m.insert(x.metric.name().into(), serde_json::to_value(x).unwrap_or(Value::Null));
    }
    m
}

/// A signed score difference for the human view.
fn signed(x: f64) -> String {
    // -0.00 reads as a difference where there is none.
    if x.abs() < 0.005 {
        format!("{:.2}", 0.0)
    } else {
        format!("{x:+.2}")
    }
}

/// Human lines of a comparison (no trailing newline), each starting with `indent`: a table with
/// one row per metric (A, B, A - B, the interval of A - B, the p-value), then what the columns
/// mean with the settings behind them.
pub fn comparison_lines(c: &Comparison, indent: &str) -> Vec<String> {
    let s = &c.settings;
    let pct = (100.0 * s.level * 1e6).round() / 1e6;
    let head = format!("{pct}% interval of A - B");
    let mut out = vec![format!("{indent}{:<8}{:>8}{:>8}{:>9}   {head:^24}{:>9}", "", "A", "B", "A - B", "p-value")];
    for x in &c.metrics {
        let interval = x.interval.map_or_else(|| "-".to_owned(), |i| format!("{} .. {}", signed(i.low), signed(i.high)));
        let p = x.p_value.map_or_else(|| "-".to_owned(), |p| format!("{p:.4}"));
        out.push(format!("{indent}{:<8}{:>8.2}{:>8.2}{:>9}   {interval:^24}{p:>9}", x.metric.title(), x.a.score, x.b.score, signed(x.difference)));
    }
    out.push(format!("{indent}A - B above 0: A scores higher on these {} segments.", c.segments));
    if c.metrics.iter().any(|x| x.interval.is_some()) {
        out.push(format!(
            "{indent}interval: paired bootstrap, {} replicates reweighting every segment by Poisson(1) weights drawn from its id (the same weight for A and B), seed {}",
            s.resamples, s.seed
        ));
    }
    if c.metrics.iter().any(|x| x.p_value.is_some()) {
        out.push(format!(
            "{indent}p-value: approximate randomization, {} trials each swapping A's and B's output of every segment with probability 1/2 (seed {}); (c + 1) / (trials + 1), c = trials with |A - B| at least the observed",
            s.trials, s.seed
        ));
        if c.metrics.iter().any(|x| x.p_value.is_some() && x.extreme_trials == 0) {
            out.push(format!("{indent}  a p-value of {:.4} is the smallest {} trials can give: no trial came as far apart", compare::p_value(0, s.trials), s.trials));
        }
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn the_human_view_has_a_column_per_order_and_the_brevity_counts() {
        let mut st = CorpusStats { segments: 2, ..Default::default() };
        st.bleu.matches[..4].copy_from_slice(&[9, 6, 4, 2]);
        st.bleu.totals[..4].copy_from_slice(&[10, 8, 6, 4]);
        (st.bleu.hyp_len, st.bleu.ref_len) = (10, 11);
        let c: ScoreConfig = "bleu chrf++".parse().unwrap();
        let lines = stats_lines(&st, &c, "");
        assert!(lines[0].starts_with("BLEU"), "{lines:?}");
        assert!(lines[1].contains("1-gram") && lines[1].contains("4-gram"), "{lines:?}");
        assert!(lines[2].contains("matched") && lines[2].trim_end().ends_with('2'), "{lines:?}");
        assert!(lines[4].contains("90.0%") && lines[4].contains("50.0%"), "{lines:?}");
        // exp(1 - 11/10) = 0.9048...
        assert!(lines[5].contains("0.9048") && lines[5].contains("10 hypothesis against 11 reference tokens"), "{lines:?}");
        assert!(lines[6].starts_with("chrF++") && lines[6].contains("word 1..2"), "{lines:?}");
        let j = Value::Object(stats_json(&st, &c));
        assert_eq!(j["bleu"]["candidates"], json!([10, 8, 6, 4]));
        assert_eq!(j["bleu"]["tokens"], json!({"hypothesis": 10, "reference": 11, "ratio": 10.0 / 11.0}));
    }
}

/// Guard counts as JSON (`score --json`, `status --json`, key `guards`): items checked, the
/// target language, per guard the items flagged, undecided, and the rate over decided items.
pub fn guards_json(counts: &GuardCounts, target: Option<&str>) -> Value {
    let mut guards = Map::new();
    for g in Guard::ALL {
        guards.insert(
            g.name().into(),
            json!({"flagged": counts.flagged_by(g), "undecided": counts.undecided_by(g), "rate": counts.rate(g)}),
        );
    }
    json!({"checked": counts.checked, "target_language": target, "by_guard": guards})
}

/// Human lines of guard counts, each starting with `indent`.
pub fn guard_lines(counts: &GuardCounts, target: Option<&str>, indent: &str) -> Vec<String> {
    let mut out = vec![format!(
        "{indent}guards  {} items checked against their sources, target language {}",
        counts.checked,
        target.unwrap_or("not declared (script and language undecided)")
    )];
    for g in Guard::ALL {
        let rate = counts.rate(g).map_or_else(|| "     -".to_owned(), |r| format!("{:>5.1}%", 100.0 * r));
        let undecided = match counts.undecided_by(g) {
            0 => String::new(),
            u => format!("  ({u} undecided)"),
        };
        out.push(format!("{indent}  {:<11}{:>8} flagged {rate}{undecided}", g.name(), counts.flagged_by(g)));
    }
    out
}

/// What the guards took from the reference set, as keys of the `guards` JSON object
/// (`score --json`, `status --json`): `length_ratio`, `length_ratio_from` and
/// `language_vocabulary` (its words, or 0 and why there is none).
pub fn insert_guard_setup(guards: &mut Value, setup: &GuardSetup) {
    if let Value::Object(o) = guards {
        o.insert("length_ratio".into(), json!(setup.length_ratio));
        o.insert("length_ratio_from".into(), json!(setup.length_ratio_from.name()));
        let vocabulary = match &setup.vocabulary {
            Ok(words) => json!({ "words": words }),
            Err(why) => json!({ "words": 0, "none_because": why }),
        };
        o.insert("language_vocabulary".into(), vocabulary);
    }
}

/// What the guards took from the reference set, in one human line starting with `indent`.
pub fn guard_setup_line(setup: &GuardSetup, indent: &str) -> String {
    let vocabulary = match &setup.vocabulary {
        Ok(words) => format!("language vocabulary of {words} words from the references"),
        Err(why) => format!("no language vocabulary: {why}"),
    };
    let from = match setup.length_ratio_from {
        crate::guard::RatioFrom::Learned => "learned from the references and their sources",
        crate::guard::RatioFrom::Setting => "set",
        crate::guard::RatioFrom::Default => "the default, not learned (too few source characters in the reference set)",
    };
    format!("{indent}(expected length ratio {:.3}, {from}; {vocabulary})", setup.length_ratio)
}

/// One item's verdict as JSON (per-segment output): the guards that flagged it and those that
/// could not decide.
pub fn verdict_json(v: Verdict) -> Value {
    let names = |it: &mut dyn Iterator<Item = Guard>| it.map(Guard::name).collect::<Vec<_>>();
    json!({"flagged": names(&mut v.flagged_guards()), "undecided": names(&mut v.undecided_guards())})
}
