//! Two sessions compared over the segments both `recent` windows hold: what the `Compare` call
//! answers and what the alert rules of kind `drop` judge by.

use std::collections::HashMap;

use super::error::{Result, ServiceError};
use crate::external::compare::{compare_declared, ValueComparison, WindowValues};
use crate::external::ExternalSpec;
use crate::metric::compare::{compare, CompareSettings, Comparison};
use crate::metric::resample::Replicates;
use crate::metric::{CorpusStats, SegmentStats};
use crate::session::Session;

/// A comparison of two sessions' windows.
#[derive(Debug, Clone)]
pub struct Paired {
    /// Over the segments in both windows.
    pub comparison: Comparison,
    /// Segments in A's window, and in B's (each segment once).
    pub recent_a: u64,
    /// See `recent_a`.
    pub recent_b: u64,
}

/// Compare session `a` with session `b` (CPU work: call from a blocking thread). They must
/// score against the same reference-set version with the same configuration.
pub fn paired(a: &Session, b: &Session, settings: &CompareSettings, threads: usize) -> Result<Paired> {
    if a.refs().digest() != b.refs().digest() {
        return Err(ServiceError::NotComparable(format!(
            "sessions '{}' and '{}' score against different reference-set versions ({} and {}): their segments cannot be paired",
            a.spec().name,
            b.spec().name,
            &a.refs().digest_hex()[..16],
            &b.refs().digest_hex()[..16]
        )));
    }
    if a.spec().config != b.spec().config {
        return Err(ServiceError::NotComparable(format!(
            "sessions '{}' and '{}' use different configurations ({} vs {}): their scores are not comparable",
            a.spec().name,
            b.spec().name,
            a.spec().config.describe(),
            b.spec().config.describe()
        )));
    }
    let (in_a, in_b) = (a.recent_segments(), b.recent_segments());
    let of_b: HashMap<u64, &SegmentStats> = in_b.iter().map(|(k, s)| (*k, s)).collect();
    let (mut keys, mut sa, mut sb) = (Vec::new(), Vec::new(), Vec::new());
    for (k, s) in &in_a {
        if let Some(t) = of_b.get(k) {
            keys.push(*k);
            sa.push(*s);
            sb.push(**t);
        }
    }
    let comparison = compare(&a.spec().config, &keys, &sa, &sb, settings, threads);
    Ok(Paired { comparison, recent_a: in_a.len() as u64, recent_b: in_b.len() as u64 })
}

/// A session's external `recent` window values for a comparison (per metric, latest value
/// per key).
pub fn external_values(s: &Session) -> WindowValues {
    s.spec().external.specs().iter().enumerate().map(|(m, spec)| (spec.clone(), s.external_recent_by_key(m))).collect()
}

/// Each external metric session `a` declares, in its order, compared with session `b`'s over
/// the items both `recent` windows hold (matched by key; a key seen more than once counts with
/// its latest value), with why not when there is nothing to compare (CPU work: call from a
/// blocking thread).
pub fn external(a: &Session, b: &Session, settings: &CompareSettings, threads: usize) -> Vec<(ExternalSpec, ValueComparison, &'static str)> {
    compare_declared(&external_values(a), &external_values(b), settings, threads)
}

/// The statistics and replicate sums of both `recent` windows, when they hold the same
/// segments, each once (a probe set replayed to both sessions, say): then the comparison
/// [`paired`] makes sums exactly these (the same segments with the same weights, integers),
/// and the sessions keep them up to date, so a `drop` rule reads them without summing the
/// windows again (R x window x fields multiply-adds per evaluation). None otherwise, or when
/// the two are not comparable or resample differently: [`paired`] then decides.
pub fn same_segments(a: &Session, b: &Session) -> Option<((CorpusStats, Replicates), (CorpusStats, Replicates))> {
    if a.refs().digest() != b.refs().digest() || a.spec().config != b.spec().config || a.spec().resampling != b.spec().resampling {
        return None;
    }
    let (sa, ra, ka) = a.recent_with_keys()?;
    let (sb, rb, kb) = b.recent_with_keys()?;
    let once = |k: &[u64]| k.windows(2).all(|w| w[0] != w[1]);
    (ka == kb && once(&ka)).then_some(((sa, ra), (sb, rb)))
}

/// Segments per [`crate::pb::SegmentChunk`] (about 280 kB at the widest configuration).
pub const SEGMENT_CHUNK: usize = 1024;

/// A session's `recent` window as chunks of `per_chunk` segments (at least one chunk, empty
/// when the window is), then its external metrics' window values in chunks of
/// [`EXTERNAL_CHUNK`]. CPU work: call from a blocking thread.
pub fn segment_chunks(s: &Session, per_chunk: usize) -> Vec<crate::pb::SegmentChunk> {
    let layout = crate::metric::layout::Layout::new(&s.spec().config);
    let segments = s.recent_segments();
    let head = crate::pb::SegmentChunk {
        session: s.spec().name.clone(),
        refset_digest: s.refs().digest_hex(),
        config: Some(crate::pb::convert::config_to_pb(&s.spec().config)),
        width: layout.width() as u32,
        window_segments: segments.len() as u64,
        ..Default::default()
    };
    let mut out: Vec<crate::pb::SegmentChunk> = segments
        .chunks(per_chunk.max(1))
        .map(|part| {
            let mut c = crate::pb::SegmentChunk { keys: part.iter().map(|(k, _)| *k).collect(), ..head.clone() };
            for (_, st) in part {
                layout.encode(st, &mut c.fields);
            }
            c
        })
        .collect();
    if out.is_empty() {
        out.push(head.clone());
    }
    for (spec, values) in external_values(s) {
        let metric = crate::pb::external::spec_to_pb(&spec);
        for part in values.chunks(EXTERNAL_CHUNK) {
            let (keys, values) = part.iter().copied().unzip();
            out.push(crate::pb::SegmentChunk { external: vec![crate::pb::ExternalWindowValues { metric: Some(metric.clone()), keys, values }], ..head.clone() });
        }
    }
    out
}

/// External values per [`crate::pb::SegmentChunk`] (at most about 1.3 MB: two varints each).
pub const EXTERNAL_CHUNK: usize = 65_536;

#[cfg(test)]
mod tests {
    use std::sync::Arc;

    use super::*;
    use crate::metric::compare::difference_interval;
    use crate::metric::resample::DEFAULT_LEVEL;
    use crate::metric::scores::corpus_score;
    use crate::metric::Metric;
    use crate::refs::compiled::Scratch;
    use crate::refs::{RefSet, SegmentInput};
    use crate::rng::SplitMix64;
    use crate::session::{ItemKey, SessionSpec};

    const WORDS: &[&str] = &["die", "Fähre", "nach", "Kiel", "fährt", "heute", "um", "neun", "Uhr", "ab", "Deck", "sieben", "bleibt", "geschlossen"];

    fn sessions(window: usize) -> (Session, Session, Vec<SegmentInput>) {
        let mut rng = SplitMix64::new(21);
        let segments: Vec<SegmentInput> = (0..400).map(|i| SegmentInput { id: format!("n{i}"), source: None, refs: vec![(0..10).map(|_| WORDS[rng.index(WORDS.len())]).collect::<Vec<_>>().join(" ")] }).collect();
        let set = Arc::new(RefSet::new(segments.clone()).unwrap());
        let spec = |name: &str| SessionSpec { name: name.into(), refset: "ferry".into(), config: Default::default(), labels: Default::default(), window, resampling: Default::default(), target_language: None, guard_settings: Vec::new(), external: Default::default() };
        (Session::new(spec("a"), Arc::clone(&set), 0), Session::new(spec("b"), set, 0), segments)
    }

    /// Feed `items` to `s`, each keeping its reference words with chance `1 - drop`, in
    /// batches of `batch`.
    fn feed(s: &Session, segments: &[SegmentInput], items: &[usize], drop: f64, batch: usize, rng: &mut SplitMix64) {
        let mut scratch = Scratch::default();
        for chunk in items.chunks(batch) {
            let outcomes: Vec<_> = chunk
                .iter()
                .map(|&i| {
                    let hyp: Vec<&str> = segments[i].refs[0].split(' ').filter(|_| !rng.chance(drop)).collect();
                    s.score_item(ItemKey::Id(&segments[i].id), &hyp.join(" "), &mut scratch)
                })
                .collect();
            s.apply("", 0, &outcomes, 0, None).unwrap();
        }
    }

    /// External metrics: compared when both sessions declare them alike, with the reason
    /// otherwise; a key sent twice counts with its latest value.
    #[test]
    fn external_metrics_are_paired_by_key_when_declared_alike() {
        use crate::external::Declaration;
        let set = Arc::new(RefSet::new(vec![SegmentInput { id: "n1".into(), source: None, refs: vec!["die Fähre".into()] }]).unwrap());
        let spec = |name: &str, decl: &[&str]| SessionSpec {
            name: name.into(),
            refset: "ferry".into(),
            config: Default::default(),
            labels: Default::default(),
            window: 10,
            resampling: Default::default(),
            target_language: None,
            guard_settings: Vec::new(),
            external: Declaration::new(decl.iter().map(|d| d.parse().unwrap()).collect()).unwrap(),
        };
        let a = Session::new(spec("a", &["qe:0:1", "ter:0:100:better=lower", "fluency:0:5"]), Arc::clone(&set), 0);
        let b = Session::new(spec("b", &["ter:0:100:better=lower:places=2", "qe:0:1"]), set, 0);
        let send = |s: &Session, name: &str, items: &[(&str, f64)]| {
            let m = s.spec().external.clone();
            let items: Vec<_> = items.iter().map(|(k, v)| (crate::metric::resample::segment_key(k.as_bytes()), m.check_item([(name, *v)]).unwrap())).collect();
            s.apply_external(&s.external_delta(&items).unwrap()).unwrap();
        };
        send(&a, "qe", &[("k1", 0.5), ("k2", 0.25), ("k1", 0.75), ("only-a", 0.1)]);
        send(&b, "qe", &[("k2", 0.5), ("k1", 0.5), ("only-b", 0.9)]);
        let settings = CompareSettings { resamples: 50, seed: 1, level: DEFAULT_LEVEL, trials: 100 };
        let got = external(&a, &b, &settings, 1);
        let names: Vec<(&str, &str)> = got.iter().map(|(s, _, note)| (s.name.as_str(), *note)).collect();
        assert_eq!(names, vec![("qe", ""), ("ter", crate::external::compare::DECLARED_OTHERWISE), ("fluency", crate::external::compare::NOT_IN_B)]);
        // k1: 0.75 (latest) against 0.5; k2: 0.25 against 0.5. Mean difference 0.
        let qe = &got[0].1;
        assert_eq!((qe.items, qe.difference, qe.a.unwrap().mean, qe.b.unwrap().mean), (2, Some(0.0), 0.5, 0.5));
        assert_eq!((got[1].1.items, got[1].1.difference), (0, None));
    }

    /// The windows' own sums give exactly what the paired comparison gives when both windows
    /// hold the same segments once; a repeated segment or another segment set falls back.
    #[test]
    fn same_segments_equals_the_paired_comparison() {
        let (a, b, segments) = sessions(150);
        let mut rng = SplitMix64::new(4);
        // A probe set replayed in a shuffled order to both, more than a window's worth.
        let mut order: Vec<usize> = (0..segments.len()).collect();
        for i in (1..order.len()).rev() {
            order.swap(i, rng.index(i + 1));
        }
        feed(&a, &segments, &order[..370], 0.3, 17, &mut rng);
        feed(&b, &segments, &order[..370], 0.1, 23, &mut rng);
        let ((sa, ra), (sb, rb)) = same_segments(&a, &b).expect("the same 150 segments, each once");
        let settings = CompareSettings { resamples: a.spec().resampling.resamples, seed: a.spec().resampling.seed, level: DEFAULT_LEVEL, trials: 0 };
        let slow = paired(&a, &b, &settings, 1).unwrap();
        let config = a.spec().config;
        for m in [Metric::Bleu, Metric::Chrf] {
            let want = slow.comparison.get(m).unwrap();
            let got = difference_interval(&ra, &rb, m, DEFAULT_LEVEL).unwrap();
            assert_eq!((got.low, got.high), (want.interval.unwrap().low, want.interval.unwrap().high), "{m}");
            assert_eq!(corpus_score(&sa, &config, m).unwrap() - corpus_score(&sb, &config, m).unwrap(), want.difference, "{m}");
            assert!(want.difference < 0.0, "a drops more words than b: {}", want.difference);
        }
        assert_eq!((sa.segments, sb.segments, slow.comparison.segments), (150, 150, 150));
        // One segment twice in a's window: the comparison counts it once, the window twice.
        feed(&a, &segments, &[order[369]], 0.3, 1, &mut rng);
        feed(&b, &segments, &[order[370]], 0.1, 1, &mut rng);
        assert!(same_segments(&a, &b).is_none(), "repeated segment");
        // Different segments in the two windows.
        feed(&a, &segments, &order[..150], 0.3, 50, &mut rng);
        feed(&b, &segments, &order[200..350], 0.1, 50, &mut rng);
        assert!(same_segments(&a, &b).is_none(), "different segments");
    }
}
