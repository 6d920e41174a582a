//! Conversions between the API's external-metric messages and [`crate::external`].

use crate::external::replicates::ExternalReplicates;
use crate::external::{Declaration, ExternalSpec, ExternalSums, ExternalTotals, ItemValues, ValueError, DEFAULT_DECIMALS};
use crate::pb;

use super::convert::{interval_to_pb, ConvertError};

/// One declared metric, defaults filled in and validated.
pub fn spec_from_pb(m: &pb::ExternalMetric) -> Result<ExternalSpec, ConvertError> {
    let spec = ExternalSpec { name: m.name.clone(), low: m.low, high: m.high, higher_is_better: !m.lower_is_better, decimals: m.decimals.unwrap_or(DEFAULT_DECIMALS) };
    spec.validate().map_err(|e| ConvertError(format!("external: {e}")))?;
    Ok(spec)
}

/// A session's declaration, validated (names unique, at most the limit).
pub fn declaration_from_pb(ms: &[pb::ExternalMetric]) -> Result<Declaration, ConvertError> {
    let specs = ms.iter().map(spec_from_pb).collect::<Result<Vec<_>, _>>()?;
    Declaration::new(specs).map_err(|e| ConvertError(format!("external: {e}")))
}

/// A declared metric as the API writes it (every default filled in).
pub fn spec_to_pb(s: &ExternalSpec) -> pb::ExternalMetric {
    pb::ExternalMetric { name: s.name.clone(), low: s.low, high: s.high, lower_is_better: !s.higher_is_better, decimals: Some(s.decimals) }
}

/// The declaration as the API writes it.
pub fn declaration_to_pb(d: &Declaration) -> Vec<pb::ExternalMetric> {
    d.specs().iter().map(spec_to_pb).collect()
}

/// An item's external values, checked against the declaration. Names are taken in byte order,
/// so an item with several bad values is always rejected naming the same one.
pub fn item_values(d: &Declaration, item: &pb::ScoreItem) -> Result<ItemValues, ValueError> {
    let mut named: Vec<(&str, f64)> = item.external.iter().map(|(k, v)| (k.as_str(), *v)).collect();
    named.sort_unstable_by(|a, b| a.0.cmp(b.0));
    d.check_item(named)
}

/// One metric's result: the exact sums, the mean and standard deviation derived from them, and
/// the interval of the mean from the replicates (metric `index` in them) when given.
pub fn result_to_pb(spec: &ExternalSpec, sums: &ExternalSums, reps: Option<(&ExternalReplicates, usize)>, level: f64) -> pb::ExternalResult {
    pb::ExternalResult {
        metric: spec.name.clone(),
        count: sums.count,
        sum: sums.sum.to_string(),
        squares: sums.squares.to_string(),
        decimals: spec.decimals,
        mean: sums.mean(spec.decimals),
        stddev: sums.variance(spec.decimals).map(f64::sqrt),
        interval: reps.and_then(|(r, m)| r.interval(m, spec.decimals, level)).map(interval_to_pb),
        lower_is_better: !spec.higher_is_better,
        replicate_sums: None,
    }
}

/// Metric `m`'s replicate sums as the API writes them.
pub fn replicate_sums_to_pb(r: &ExternalReplicates, m: usize) -> pb::ExternalReplicateSums {
    let (counts, sums): (Vec<u64>, Vec<String>) = (0..r.resamples()).filter_map(|i| r.replicate(m, i)).map(|(c, s)| (c, s.to_string())).unzip();
    pb::ExternalReplicateSums { resamples: r.resamples() as u32, seed: r.seed(), counts, sums }
}

/// One metric's replicate sums from an API message (None: they do not parse or fit).
pub fn replicate_sums_from_pb(p: &pb::ExternalReplicateSums) -> Option<ExternalReplicates> {
    let sums = p.sums.iter().map(|s| s.parse::<i128>().ok()).collect::<Option<Vec<i128>>>()?;
    ExternalReplicates::from_parts(1, p.resamples as usize, p.seed, p.counts.clone(), sums)
}

/// Every declared metric's result, in declaration order.
pub fn results_to_pb(d: &Declaration, totals: &ExternalTotals, reps: Option<&ExternalReplicates>, level: f64) -> Vec<pb::ExternalResult> {
    d.specs().iter().zip(&totals.0).enumerate().map(|(i, (s, t))| result_to_pb(s, t, reps.map(|r| (r, i)), level)).collect()
}

/// A comparison of one external metric as the API writes it.
pub fn comparison_to_pb(spec: &ExternalSpec, c: &crate::external::compare::ValueComparison, note: &str) -> pb::ExternalComparison {
    use super::convert::interval_to_pb;
    pb::ExternalComparison {
        metric: spec.name.clone(),
        items: c.items,
        a: c.a.map(|s| s.mean),
        b: c.b.map(|s| s.mean),
        a_interval: c.a.and_then(|s| s.interval).map(interval_to_pb),
        b_interval: c.b.and_then(|s| s.interval).map(interval_to_pb),
        difference: c.difference,
        interval: c.interval.map(interval_to_pb),
        p_value: c.p_value,
        trials: c.trials as u64,
        extreme_trials: c.extreme_trials as u64,
        lower_is_better: !spec.higher_is_better,
        decimals: spec.decimals,
        note: note.to_owned(),
    }
}

/// The external results of several replicas' reports added up (a fleet figure): counts and
/// fixed-point sums exactly, the mean and standard deviation derived from the sums, and the
/// interval at `level` from the replicate sums added up, when every replica sent them with the
/// same replicates and seed (else none). Refused when the replicas declare different metrics.
pub fn merge_results(parts: &[&[pb::ExternalResult]], level: f64) -> Result<Vec<pb::ExternalResult>, ConvertError> {
    let Some(first) = parts.first() else { return Ok(Vec::new()) };
    let same = |a: &pb::ExternalResult, b: &pb::ExternalResult| (a.metric.as_str(), a.decimals, a.lower_is_better) == (b.metric.as_str(), b.decimals, b.lower_is_better);
    let int = |s: &str, what: &str| s.parse::<i128>().map_err(|_| ConvertError(format!("external {what} '{s}' is not an integer")));
    let mut out = Vec::with_capacity(first.len());
    for (i, head) in first.iter().enumerate() {
        let mut acc = ExternalSums::default();
        // None once a replica sent no (or unlike) replicate sums.
        let mut reps: Option<Option<ExternalReplicates>> = None;
        for p in parts {
            let r = p.get(i).filter(|r| same(r, head) && p.len() == first.len()).ok_or_else(|| ConvertError("the replicas declare different external metrics".into()))?;
            let s = ExternalSums { count: r.count, sum: int(&r.sum, "sum")?, squares: int(&r.squares, "squares")? };
            acc = acc.checked_add(&s).map_err(|e| ConvertError(e.to_string()))?;
            let mine = r.replicate_sums.as_ref().and_then(replicate_sums_from_pb);
            reps = Some(match (reps, mine) {
                (None, m) => m,
                (Some(Some(mut a)), Some(m)) => a.merge(&m).ok().map(|_| a),
                _ => None,
            });
        }
        out.push(pb::ExternalResult {
            metric: head.metric.clone(),
            count: acc.count,
            sum: acc.sum.to_string(),
            squares: acc.squares.to_string(),
            decimals: head.decimals,
            mean: acc.mean(head.decimals),
            stddev: acc.variance(head.decimals).map(f64::sqrt),
            interval: reps.flatten().and_then(|r| r.interval(0, head.decimals, level)).map(interval_to_pb),
            lower_is_better: head.lower_is_better,
            replicate_sums: None,
        });
    }
    Ok(out)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::metric::resample::segment_key;

    fn decl() -> Declaration {
        declaration_from_pb(&[
            pb::ExternalMetric { name: "qe".into(), low: 0.0, high: 1.0, ..Default::default() },
            pb::ExternalMetric { name: "edit_rate".into(), low: 0.0, high: 100.0, lower_is_better: true, decimals: Some(2) },
        ])
        .unwrap()
    }

    #[test]
    fn declarations_round_trip_with_defaults_filled_in() {
        let d = decl();
        let back = declaration_to_pb(&d);
        assert_eq!(back[0].decimals, Some(DEFAULT_DECIMALS));
        assert!(!back[0].lower_is_better && back[1].lower_is_better);
        assert_eq!(declaration_from_pb(&back).unwrap(), d);
    }

    #[test]
    fn bad_declarations_name_the_metric() {
        let e = declaration_from_pb(&[pb::ExternalMetric { name: "qe".into(), low: 1.0, high: 0.0, ..Default::default() }]).unwrap_err();
        assert!(e.0.contains("'qe'"), "{e}");
        let e = declaration_from_pb(&[pb::ExternalMetric { name: "q-e".into(), low: 0.0, high: 1.0, ..Default::default() }]).unwrap_err();
        assert!(e.0.contains("'q-e'"), "{e}");
        let twice = pb::ExternalMetric { name: "qe".into(), low: 0.0, high: 1.0, ..Default::default() };
        assert!(declaration_from_pb(&[twice.clone(), twice]).unwrap_err().0.contains("twice"));
    }

    #[test]
    fn item_values_are_checked_and_the_first_bad_name_in_byte_order_is_named() {
        let d = decl();
        let item = |vals: &[(&str, f64)]| pb::ScoreItem { external: vals.iter().map(|(k, v)| (k.to_string(), *v)).collect(), ..Default::default() };
        assert_eq!(item_values(&d, &item(&[("qe", 0.5), ("edit_rate", 12.5)])), Ok(ItemValues(vec![(0, 500_000), (1, 1250)])));
        let e = item_values(&d, &item(&[("zz", 0.5), ("qe", 2.0), ("aa", 0.1)])).unwrap_err();
        assert_eq!(e.metric(), Some("aa"));
    }

    #[test]
    fn fleet_results_add_the_sums_exactly() {
        let d = decl();
        let totals = |vals: &[f64]| {
            let mut t = ExternalTotals::new(d.len());
            for v in vals {
                t.add_item(&d.check_item([("qe", *v)]).unwrap()).unwrap();
            }
            results_to_pb(&d, &t, None, 0.95)
        };
        let (a, b, all) = (totals(&[0.25, 0.5]), totals(&[0.75]), totals(&[0.25, 0.5, 0.75]));
        assert_eq!(merge_results(&[&a, &b], 0.95).unwrap(), all);
        let other = results_to_pb(&Declaration::new(vec![ExternalSpec::new("qe", 0.0, 1.0).unwrap()]).unwrap(), &ExternalTotals::new(1), None, 0.95);
        assert!(merge_results(&[&a, &other], 0.95).unwrap_err().0.contains("different"));
        assert_eq!(merge_results(&[], 0.95).unwrap(), Vec::new());
    }

    #[test]
    fn fleet_intervals_come_from_the_summed_replicate_sums() {
        let d = decl();
        // Results with replicate sums over the items `from..to` (qe = i / 100, key "call-i").
        let part = |from: usize, to: usize| {
            let mut t = ExternalTotals::new(d.len());
            let mut reps = ExternalReplicates::new(d.len(), 40, 3);
            let mut w = Vec::new();
            for i in from..to {
                let it = d.check_item([("qe", i as f64 / 100.0)]).unwrap();
                t.add_item(&it).unwrap();
                reps.add(segment_key(format!("call-{i}").as_bytes()), &it, &mut w).unwrap();
            }
            let mut r = results_to_pb(&d, &t, Some(&reps), 0.9);
            for (m, x) in r.iter_mut().enumerate() {
                x.replicate_sums = Some(replicate_sums_to_pb(&reps, m));
            }
            (r, reps)
        };
        let ((a, _), (b, _), (all, reps)) = (part(0, 17), part(17, 50), part(0, 50));
        // One metric's sums read back are that metric's replicates.
        let back = replicate_sums_from_pb(all[0].replicate_sums.as_ref().unwrap()).unwrap();
        assert!((0..40).all(|r| back.replicate(0, r) == reps.replicate(0, r)) && back.replicate(0, 40).is_none());
        assert!(reps.replicate(0, 7).is_some_and(|(c, s)| c > 0 && s > 0));
        let fleet = merge_results(&[&a, &b], 0.9).unwrap();
        assert_eq!(fleet[0].interval, all[0].interval, "the same interval as one process");
        assert!(fleet[0].interval.is_some() && fleet[1].interval.is_none(), "edit_rate has no values");
        // A replica without replicate sums: no fleet interval.
        let mut bare = b.clone();
        bare[0].replicate_sums = None;
        assert!(merge_results(&[&a, &bare], 0.9).unwrap()[0].interval.is_none());
        // Sums that do not parse are refused as such (no interval).
        let mut bad = b.clone();
        bad[0].replicate_sums.as_mut().unwrap().sums[0] = "x".into();
        assert!(replicate_sums_from_pb(bad[0].replicate_sums.as_ref().unwrap()).is_none());
    }

    #[test]
    fn results_carry_exact_sums_and_derived_values() {
        let d = decl();
        let mut t = ExternalTotals::new(d.len());
        let mut reps = ExternalReplicates::new(d.len(), 50, 1);
        let mut w = Vec::new();
        for (i, v) in [0.25, 0.5, 0.75].into_iter().enumerate() {
            let it = d.check_item([("qe", v)]).unwrap();
            t.add_item(&it).unwrap();
            reps.add(segment_key(format!("s{i}").as_bytes()), &it, &mut w).unwrap();
        }
        let r = results_to_pb(&d, &t, Some(&reps), 0.9);
        assert_eq!((r[0].count, r[0].sum.as_str(), r[0].squares.as_str()), (3, "1500000", "875000000000"));
        assert_eq!(r[0].mean, Some(0.5));
        assert!((r[0].stddev.unwrap() - 0.25).abs() < 1e-12);
        let iv = r[0].interval.as_ref().unwrap();
        assert!(iv.low <= 0.5 && 0.5 <= iv.high && iv.level == 0.9);
        assert_eq!((r[1].count, r[1].mean, r[1].stddev, r[1].interval.is_none()), (0, None, None, true));
        assert!(results_to_pb(&d, &t, None, 0.9)[0].interval.is_none());
    }
}
