use proptest::prelude::*;

use super::replicates::ExternalReplicates;
use super::*;
use crate::metric::resample::{fill_weights, segment_key};

/// Round `num / den` half to even, integers only (the oracle for `to_fixed`).
fn round_half_even(num: i128, den: i128) -> i128 {
    let (q, r) = (num.div_euclid(den), num.rem_euclid(den));
    match (2 * r).cmp(&den) {
        std::cmp::Ordering::Less => q,
        std::cmp::Ordering::Greater => q + 1,
        std::cmp::Ordering::Equal => q + (q & 1),
    }
}

fn qe() -> Declaration {
    Declaration::new(vec![ExternalSpec::new("qe", 0.0, 1.0).unwrap(), "ter_like:0:100:better=lower:places=2".parse().unwrap()]).unwrap()
}

#[test]
fn names_follow_prometheus_label_rules() {
    for good in ["qe", "QE_score", "_x", "a1", &"a".repeat(MAX_EXTERNAL_NAME_LEN)] {
        assert!(valid_name(good), "{good}");
    }
    for bad in ["", "1qe", "qe-score", "qe.score", "__qe", "qé", " qe", &"a".repeat(MAX_EXTERNAL_NAME_LEN + 1)] {
        assert!(!valid_name(bad), "{bad}");
    }
}

#[test]
fn fixed_point_rounds_half_to_even_at_the_boundaries() {
    // Decimal halves at six decimals: the even neighbour wins.
    assert_eq!(to_fixed(0.0000005, 6), Ok(0));
    assert_eq!(to_fixed(0.0000015, 6), Ok(2));
    assert_eq!(to_fixed(0.0000025, 6), Ok(2));
    assert_eq!(to_fixed(-0.0000025, 6), Ok(-2));
    assert_eq!(to_fixed(-0.0000035, 6), Ok(-4));
    assert_eq!(to_fixed(0.1234565, 6), Ok(123_456));
    assert_eq!(to_fixed(0.1234575, 6), Ok(123_458));
    assert_eq!(to_fixed(2.5, 0), Ok(2));
    assert_eq!(to_fixed(3.5, 0), Ok(4));
    assert_eq!(to_fixed(-2.5, 0), Ok(-2));
    // Just off the half: ordinary rounding.
    assert_eq!(to_fixed(0.00000250001, 6), Ok(3));
    assert_eq!(to_fixed(0.00000249999, 6), Ok(2));
    // The double nearest 0.3 is below it; the numeral is 0.3, so no drift to 299999.
    assert_eq!(to_fixed(0.3, 6), Ok(300_000));
    assert_eq!(to_fixed(1.0, 6), Ok(1_000_000));
    assert_eq!(to_fixed(-0.0, 6), Ok(0));
    assert_eq!(to_fixed(1e-30, 6), Ok(0));
    assert_eq!(to_fixed(123.456, 0), Ok(123));
    assert_eq!(to_fixed(123.456, 12), Ok(123_456_000_000_000));
    assert_eq!(to_fixed(1e20, 0), Err(FixedError::TooLarge));
    assert_eq!(to_fixed(f64::NAN, 6), Err(FixedError::NotFinite));
    assert_eq!(to_fixed(f64::NEG_INFINITY, 6), Err(FixedError::NotFinite));
}

proptest! {
    /// A decimal n / 10^k with at most 13 digits prints as itself, so `to_fixed` must equal
    /// the integer rounding of n x 10^d / 10^k.
    #[test]
    fn fixed_point_equals_integer_rounding_of_the_decimal(n in -9_999_999_999_999i64..=9_999_999_999_999, k in 0u32..=9, d in 0u32..=9) {
        let v = n as f64 / 10f64.powi(k as i32);
        let want = round_half_even(i128::from(n) * 10i128.pow(d), 10i128.pow(k));
        let got = to_fixed(v, d).map(i128::from);
        if i64::try_from(want).is_ok() {
            prop_assert_eq!(got, Ok(want));
        } else {
            prop_assert_eq!(got, Err(FixedError::TooLarge));
        }
    }

    /// Any double: no panic, and when it fits, the integer is within half a unit (plus the
    /// double's own rounding of the product) of value x 10^d.
    #[test]
    fn fixed_point_of_any_double_is_the_nearest_integer(v in prop_oneof![any::<u64>().prop_map(f64::from_bits), -1e6f64..1e6, -1.0f64..1.0], d in 0u32..=MAX_DECIMALS) {
        match to_fixed(v, d) {
            Ok(f) => {
                let x = v * 10f64.powi(d as i32);
                prop_assert!((f as f64 - x).abs() <= 0.5 + x.abs() * 4.0 * f64::EPSILON, "{} {} -> {}", v, d, f);
            }
            Err(FixedError::NotFinite) => prop_assert!(!v.is_finite()),
            Err(FixedError::TooLarge) => prop_assert!((v * 10f64.powi(d as i32)).abs() >= 9.2e18 * (1.0 - 1e-12)),
        }
    }

    /// Sums over any split and order of the items equal one pass over them.
    #[test]
    fn sums_are_additive_and_order_independent(values in proptest::collection::vec((0u32..=1_000_000, 0u32..=10_000), 0..60), cut in 0usize..60, seed in any::<u64>()) {
        let decl = qe();
        let items: Vec<ItemValues> = values.iter().map(|&(a, b)| decl.check_item([("qe", f64::from(a) / 1e6), ("ter_like", f64::from(b) / 100.0)]).unwrap()).collect();
        let mut one = ExternalTotals::new(decl.len());
        for it in &items {
            one.add_item(it).unwrap();
        }
        // Shuffle deterministically from the seed, split in two shards, merge.
        let mut order: Vec<usize> = (0..items.len()).collect();
        let mut s = seed;
        for i in (1..order.len()).rev() {
            s = crate::metric::resample::mix64(s.wrapping_add(i as u64));
            order.swap(i, (s % (i as u64 + 1)) as usize);
        }
        let cut = cut.min(order.len());
        let (mut a, mut b) = (ExternalTotals::new(decl.len()), ExternalTotals::new(decl.len()));
        for &i in &order[..cut] { a.add_item(&items[i]).unwrap(); }
        for &i in &order[cut..] { b.add_item(&items[i]).unwrap(); }
        b.merge(&a).unwrap();
        prop_assert_eq!(&b, &one);
        // And the fixed-point sums are the integer sums of the inputs.
        prop_assert_eq!(one.0[0].sum, values.iter().map(|&(a, _)| i128::from(a)).sum::<i128>());
        prop_assert_eq!(one.0[1].squares, values.iter().map(|&(_, b)| i128::from(b) * i128::from(b)).sum::<i128>());
        prop_assert_eq!(one.0[0].count, values.len() as u64);

        // Replicates: the same, per replicate.
        let key = |i: usize| segment_key(format!("seg-{i}").as_bytes());
        let mut w = Vec::new();
        let mut rep_one = ExternalReplicates::new(decl.len(), 40, 7);
        for (i, it) in items.iter().enumerate() { rep_one.add(key(i), it, &mut w).unwrap(); }
        let (mut ra, mut rb) = (ExternalReplicates::new(decl.len(), 40, 7), ExternalReplicates::new(decl.len(), 40, 7));
        for &i in &order[..cut] { ra.add(key(i), &items[i], &mut w).unwrap(); }
        for &i in &order[cut..] { rb.add(key(i), &items[i], &mut w).unwrap(); }
        rb.merge(&ra).unwrap();
        prop_assert_eq!(&rb, &rep_one);
        rb.subtract(&ra).unwrap();
        let mut only_b = ExternalReplicates::new(decl.len(), 40, 7);
        for &i in &order[cut..] { only_b.add(key(i), &items[i], &mut w).unwrap(); }
        prop_assert_eq!(rb, only_b);
    }
}

#[test]
fn spec_syntax_parses_and_prints_back() {
    let s: ExternalSpec = "qe_da:-1:1".parse().unwrap();
    assert_eq!(s, ExternalSpec { name: "qe_da".into(), low: -1.0, high: 1.0, higher_is_better: true, decimals: DEFAULT_DECIMALS });
    let t: ExternalSpec = "edit_rate:0:100:places=2:better=lower".parse().unwrap();
    assert_eq!((t.higher_is_better, t.decimals), (false, 2));
    assert_eq!(t.to_string().parse::<ExternalSpec>().unwrap(), t);
    assert_eq!(s.to_string().parse::<ExternalSpec>().unwrap(), s);
    assert_eq!(t.scale(), 100);
}

#[test]
fn bad_specs_are_refused_with_the_reason() {
    let err = |s: &str| s.parse::<ExternalSpec>().unwrap_err();
    assert!(matches!(err("qe:0"), SpecError::Syntax { .. }));
    assert!(matches!(err("qe:zero:1"), SpecError::Syntax { .. }));
    assert!(matches!(err("qe:0:1:better=sideways"), SpecError::Syntax { .. }));
    assert!(matches!(err("qe:0:1:places=2:places=3"), SpecError::Syntax { .. }));
    assert!(matches!(err("qe:0:1:colour=red"), SpecError::Syntax { .. }));
    assert!(matches!(err("1qe:0:1"), SpecError::BadName(_)));
    assert!(matches!(err("__qe:0:1"), SpecError::BadName(_)));
    assert!(matches!(err("qe:1:0"), SpecError::BadRange { .. }));
    assert!(matches!(err("qe:0:0"), SpecError::BadRange { .. }));
    assert!(matches!(err("qe:0:inf"), SpecError::BadRange { .. }));
    assert!(matches!(err("qe:0:NaN"), SpecError::BadRange { .. }));
    assert!(matches!(err("qe:0:1:places=13"), SpecError::TooManyDecimals { .. }));
    // 10^10 x 10^6 = 10^16 > MAX_FIXED_MAGNITUDE; with fewer places it fits.
    assert!(matches!(err("qe:0:1e10"), SpecError::RangeTooWide { .. }));
    assert!("qe:0:1e10:places=5".parse::<ExternalSpec>().is_ok());
    assert!(err("qe:1:0").to_string().contains("'qe'"));

    let two = || ExternalSpec::new("qe", 0.0, 1.0).unwrap();
    assert_eq!(Declaration::new(vec![two(), two()]), Err(SpecError::Duplicate("qe".into())));
    let many: Vec<ExternalSpec> = (0..=MAX_EXTERNAL_METRICS).map(|i| ExternalSpec::new(&format!("m{i}"), 0.0, 1.0).unwrap()).collect();
    assert_eq!(Declaration::new(many), Err(SpecError::TooMany(MAX_EXTERNAL_METRICS + 1)));
}

#[test]
fn bad_values_reject_the_item_naming_the_metric() {
    let decl = qe();
    let check = |vals: &[(&'static str, f64)]| decl.check_item(vals.iter().copied());
    let cases: [(&[(&str, f64)], &str); 6] = [
        (&[("qe", 0.5), ("bleurt", 0.1)], "bleurt"),
        (&[("qe", f64::NAN)], "qe"),
        (&[("ter_like", f64::INFINITY)], "ter_like"),
        (&[("qe", 1.0000001)], "qe"),
        (&[("ter_like", -0.01), ("qe", 0.5)], "ter_like"),
        (&[("qe", 0.5), ("qe", 0.6)], "qe"),
    ];
    for (vals, metric) in cases {
        let e = check(vals).unwrap_err();
        assert_eq!(e.metric(), Some(metric), "{vals:?}");
        assert!(e.to_string().contains(&format!("'{metric}'")), "{e}");
    }
    let many: Vec<(&str, f64)> = vec![("qe", 0.5); MAX_EXTERNAL_METRICS + 1];
    assert_eq!(check(&many), Err(ValueError::TooMany { limit: MAX_EXTERNAL_METRICS }));

    // Bounds are inclusive; values come back by declaration order.
    assert_eq!(check(&[("ter_like", 100.0), ("qe", 0.0)]), Ok(ItemValues(vec![(0, 0), (1, 10_000)])));
    assert_eq!(check(&[]), Ok(ItemValues::default()));

    // The flow of a batch: an item is checked first, so a rejected one adds nothing.
    let mut totals = ExternalTotals::new(decl.len());
    for vals in [&[("qe", 0.25)][..], &[("qe", 0.5), ("bleurt", 0.1)], &[("qe", 0.75), ("ter_like", 12.345)]] {
        if let Ok(item) = check(vals) {
            totals.add_item(&item).unwrap();
        }
    }
    assert_eq!(totals.0[0], ExternalSums { count: 2, sum: 1_000_000, squares: 250_000i128.pow(2) + 750_000i128.pow(2) });
    // 12.345 at two places: 1234.5 -> 1234 (half to even).
    assert_eq!(totals.0[1], ExternalSums { count: 1, sum: 1234, squares: 1234 * 1234 });
}

#[test]
fn mean_and_variance_by_hand() {
    let decl = qe();
    let mut t = ExternalTotals::new(decl.len());
    for v in [0.25, 0.5, 0.75] {
        t.add_item(&decl.check_item([("qe", v)]).unwrap()).unwrap();
    }
    // Mean 0.5; sample variance ((-.25)^2 + 0 + .25^2) / 2 = 0.0625.
    assert_eq!(t.0[0].mean(6), Some(0.5));
    assert!((t.0[0].variance(6).unwrap() - 0.0625).abs() < 1e-15);
    assert_eq!(t.0[1].mean(2), None);
    assert_eq!(ExternalSums::one(5).variance(6), None);
}

#[test]
fn overflow_is_an_error_and_changes_nothing() {
    let big = ExternalSums { count: 3, sum: i128::MAX - 1, squares: 0 };
    assert_eq!(big.checked_add(&ExternalSums::one(5)), Err(SumError::Overflow { count: 3 }));
    let mut t = ExternalTotals(vec![ExternalSums::default(), big]);
    let before = t.clone();
    assert!(t.add_item(&ItemValues(vec![(0, 1), (1, 5)])).is_err());
    assert_eq!(t, before, "the first metric's sums must not be half-applied");
    assert_eq!(t.merge(&ExternalTotals::new(1)), Err(SumError::Mismatch));
    assert!(SumError::Overflow { count: 3 }.to_string().contains("overflow"));
}

#[test]
fn replicate_sums_are_weighted_sums_of_the_values() {
    let decl = qe();
    let items: Vec<(u64, ItemValues)> = (0..5).map(|i| (segment_key(format!("notice-{i}").as_bytes()), decl.check_item([("qe", 0.1 * f64::from(i))]).unwrap())).collect();
    let mut rep = ExternalReplicates::new(decl.len(), 12, 3);
    let mut w = Vec::new();
    for (k, it) in &items {
        rep.add(*k, it, &mut w).unwrap();
    }
    for r in 0..12 {
        let (mut c, mut s) = (0u64, 0i128);
        for (i, (k, _)) in items.iter().enumerate() {
            let mut ws = [0u8; 12];
            fill_weights(*k, 3, &mut ws);
            c += u64::from(ws[r]);
            s += i128::from(ws[r]) * 100_000 * i as i128;
        }
        assert_eq!(rep.replicate(0, r), Some((c, s)));
        // The undeclared-in-this-item metric has nothing.
        assert_eq!(rep.replicate(1, r), Some((0, 0)));
    }
    assert_eq!(rep.replicate(2, 0), None);
    assert!(rep.interval(1, 2, 0.95).is_none());
    let (counts, sums) = rep.parts();
    assert_eq!(ExternalReplicates::from_parts(2, 12, 3, counts.to_vec(), sums.to_vec()), Some(rep.clone()));
    assert_eq!(ExternalReplicates::from_parts(2, 11, 3, counts.to_vec(), sums.to_vec()), None);
    assert_eq!(rep.clone().merge(&ExternalReplicates::new(2, 12, 4)), Err(SumError::Mismatch));
    assert_eq!(rep.add(0, &ItemValues(vec![(2, 1)]), &mut w), Err(SumError::Mismatch));
}

#[test]
fn interval_of_the_mean_covers_the_mean_and_narrows_with_n() {
    // Values from a fixed generator on 0-1; intervals at 95 % over 400 replicates.
    let decl = qe();
    let width = |n: u64| {
        let mut rep = ExternalReplicates::new(decl.len(), 400, 1);
        let mut t = ExternalTotals::new(decl.len());
        let mut w = Vec::new();
        for i in 0..n {
            let v = (crate::metric::resample::mix64(i) % 1_000_001) as f64 / 1e6;
            let item = decl.check_item([("qe", v)]).unwrap();
            rep.add(segment_key(format!("seg-{i}").as_bytes()), &item, &mut w).unwrap();
            t.add_item(&item).unwrap();
        }
        let iv = rep.interval(0, 6, 0.95).unwrap();
        let mean = t.0[0].mean(6).unwrap();
        assert!(iv.low < mean && mean < iv.high, "{iv:?} {mean}");
        assert_eq!(iv.resamples, 400);
        iv.high - iv.low
    };
    let (w100, w1600) = (width(100), width(1600));
    // Standard error scales as 1/sqrt(n): 16x the items, about a quarter of the width; the
    // bounds (0.15..0.4) leave room for Monte-Carlo noise of 400 replicates (common practice).
    let ratio = w1600 / w100;
    assert!((0.15..0.4).contains(&ratio), "{ratio}");
}

#[test]
fn exported_counters_offset_by_low_and_rescale_the_squares() {
    let spec: ExternalSpec = "delta:-1:1:places=2".parse().unwrap();
    let decl = Declaration::new(vec![spec.clone()]).unwrap();
    let mut t = ExternalTotals::new(1);
    for v in [-1.0, -0.25, 0.5] {
        t.add_item(&decl.check_item([("delta", v)]).unwrap()).unwrap();
    }
    // Offsets from -1 at two places: 0, 75, 150; sum 225; squares 0 + 5625 + 22500 = 28125,
    // over 10^2: 281.25 -> 281.
    assert_eq!(exported_counters(&spec, &t.0[0]), (3, 225, 281));
    // The fleet mean and variance back from the counters: -1 + 225 / 300 = -0.25.
    let (n, sum, _) = exported_counters(&spec, &t.0[0]);
    assert_eq!(spec.low + sum as f64 / (n as f64 * 100.0), t.0[0].mean(2).unwrap());
    // Half to even on the squares: 2 values of 0.05 over low 0 at 2 places: 5^2 x 2 = 50 -> 0.5 -> 0.
    let spec0: ExternalSpec = "qe:0:1:places=2".parse().unwrap();
    assert_eq!(exported_counters(&spec0, &ExternalSums { count: 2, sum: 10, squares: 50 }), (2, 10, 0));
    assert_eq!(exported_counters(&spec0, &ExternalSums { count: 2, sum: 10, squares: 150 }), (2, 10, 2));
    assert_eq!(exported_counters(&spec0, &ExternalSums::default()), (0, 0, 0));
}

/// Window sums recomputed the plain way: one pass over the last `n` items.
fn last_n_sums(items: &[(u64, ItemValues)], n: usize, metrics: usize, resampling: (usize, u64)) -> (ExternalTotals, ExternalReplicates) {
    let tail = &items[items.len().saturating_sub(n)..];
    let mut t = ExternalTotals::new(metrics);
    let mut r = ExternalReplicates::new(metrics, resampling.0, resampling.1);
    let mut w = Vec::new();
    for (k, it) in tail {
        t.add_item(it).unwrap();
        r.add(*k, it, &mut w).unwrap();
    }
    (t, r)
}

proptest! {
    /// The window's sums (add on entry, subtract on eviction) equal the sums recomputed from its
    /// last `capacity` items after every batch: batches smaller and larger than the window,
    /// items carrying one metric or both, keys repeated, values of either sign.
    #[test]
    fn window_sums_equal_the_sums_of_the_last_n_items(
        values in proptest::collection::vec((-1_000_000i64..=1_000_000, 0i64..=10_000, 0u8..3, 0u64..40), 1..120),
        batches in proptest::collection::vec(1usize..25, 1..40),
        capacity in 1usize..30,
    ) {
        let items: Vec<(u64, ItemValues)> = values
            .iter()
            .map(|&(a, b, which, key)| {
                let v = match which { 0 => vec![(0, a)], 1 => vec![(1, b)], _ => vec![(0, a), (1, b)] };
                (segment_key(format!("call-{key}").as_bytes()), ItemValues(v))
            })
            .collect();
        let resampling = (30, 9);
        let mut w = window::ExternalWindow::new(capacity, 2, Some(resampling), 5);
        let (mut done, mut sizes) = (0, batches.iter().cycle());
        while done < items.len() {
            let n = (*sizes.next().unwrap()).min(items.len() - done);
            let batch = &items[done..done + n];
            let delta = ExternalDelta::of(2, Some(resampling), batch).unwrap();
            w.add(&delta.items, delta.replicates.as_ref()).unwrap();
            done += n;
            let (t, r) = last_n_sums(&items[..done], capacity, 2, resampling);
            prop_assert_eq!(w.totals(), &t, "after {} items", done);
            prop_assert_eq!(w.replicates(), Some(&r), "after {} items", done);
            prop_assert_eq!(w.len(), done.min(capacity));
            prop_assert_eq!((w.first_id(), w.next_id()), (5 + (done - done.min(capacity)) as u64, 5 + done as u64));
            let kept: Vec<&(u64, ItemValues)> = w.items().collect();
            let want: Vec<&(u64, ItemValues)> = items[done - done.min(capacity)..done].iter().collect();
            prop_assert_eq!(kept, want);
        }
        // Its durable rows read back to the same items, and a window rebuilt from them has the
        // same sums.
        let mut rows = Vec::new();
        w.items().for_each(|(k, v)| window::encode_item(*k, v, &mut rows));
        let back = window::decode_items(&rows, 2).unwrap();
        prop_assert_eq!(&back, &w.items().cloned().collect::<Vec<_>>());
        let rebuilt = window::ExternalWindow::restore(capacity, 2, Some(resampling), back, w.next_id()).unwrap();
        prop_assert_eq!(&rebuilt, &w);
    }
}

#[test]
fn window_by_hand_evicts_the_oldest_and_keeps_the_latest_value_per_key() {
    // Window of 3, no replicates: 0.1, 0.2, 0.3, then 0.4 pushes out 0.1.
    let decl = qe();
    let item = |v: f64| decl.check_item([("qe", v)]).unwrap();
    let mut w = window::ExternalWindow::new(3, decl.len(), None, 0);
    let batch = |ks: &[(&str, f64)]| ks.iter().map(|(k, v)| (segment_key(k.as_bytes()), item(*v))).collect::<Vec<_>>();
    w.add(&batch(&[("a", 0.1), ("b", 0.2), ("a", 0.3)]), None).unwrap();
    assert_eq!(w.totals().0[0], ExternalSums { count: 3, sum: 600_000, squares: 10_000_000_000 + 40_000_000_000 + 90_000_000_000 });
    // Key a twice: its latest value, at the place it first appeared.
    assert_eq!(w.latest_by_key(0), vec![(segment_key(b"a"), 300_000), (segment_key(b"b"), 200_000)]);
    assert!(w.latest_by_key(1).is_empty(), "no item carries the second metric");
    w.add(&batch(&[("c", 0.4)]), None).unwrap();
    assert_eq!((w.totals().0[0].count, w.totals().0[0].sum), (3, 900_000));
    assert_eq!(w.totals().0[0].mean(6), Some(0.3));
    // A batch of five into a window of three keeps its last three.
    w.add(&batch(&[("d", 0.5), ("e", 0.6), ("f", 0.7), ("g", 0.8), ("h", 0.9)]), None).unwrap();
    assert_eq!((w.totals().0[0].count, w.totals().0[0].sum, w.first_id(), w.next_id()), (3, 2_400_000, 6, 9));
    // A session that keeps replicates must pass the batch's replicate sums.
    let mut with = window::ExternalWindow::new(3, decl.len(), Some((10, 1)), 0);
    assert_eq!(with.add(&batch(&[("a", 0.1)]), None), Err(SumError::Mismatch));
    assert!(with.is_empty());
    w.clear();
    assert_eq!((w.len(), w.next_id(), w.totals(), w.capacity()), (0, 9, &ExternalTotals::new(2), 3));
    // Rows that do not parse or name an undeclared metric are refused.
    assert_eq!(window::decode_items(&[1, 1, 5, 2], 2), None);
    assert_eq!(window::decode_items(&[1, 3, 0, 2], 2), None);
    assert_eq!(window::decode_items(&[1, 2, 1, 2, 0, 4], 2), None, "indices out of order");
    assert_eq!(window::decode_items(&[7, 1, 1, 3], 2), Some(vec![(7, ItemValues(vec![(1, -2)]))]), "zigzag: 3 is -2");
    assert!(window::ExternalWindow::restore(1, 2, None, vec![(1, ItemValues(vec![])), (2, ItemValues(vec![]))], 5).is_err(), "more items than the window holds");
}

/// The randomization count written the plain way: per trial, per item, its coin (the coins of
/// the built-in comparison), then both sums with the swapped values exchanged.
fn naive_extreme(keys: &[u64], a: &[i64], b: &[i64], trials: usize, seed: u64) -> usize {
    let observed: i128 = a.iter().zip(b).map(|(&x, &y)| i128::from(x) - i128::from(y)).sum();
    (0..trials)
        .filter(|&t| {
            let d: i128 = (0..a.len())
                .map(|i| {
                    let swap = (crate::metric::compare::swap_word(keys[i], seed, (t / 64) as u64) >> (t % 64)) & 1 == 1;
                    let (x, y) = if swap { (b[i], a[i]) } else { (a[i], b[i]) };
                    i128::from(x) - i128::from(y)
                })
                .sum();
            d.abs() >= observed.abs()
        })
        .count()
}

#[test]
fn external_comparison_of_a_shifted_copy() {
    use crate::metric::compare::CompareSettings;
    let mut rng = crate::rng::SplitMix64::new(12);
    let n = 150;
    let keys: Vec<u64> = (0..n).map(|i| segment_key(format!("call-{i}").as_bytes())).collect();
    let a: Vec<i64> = (0..n).map(|_| rng.below(900_001) as i64).collect();
    // B = A + 0.05 + noise in -0.02..0.02 (six decimals).
    let b: Vec<i64> = a.iter().map(|&x| x + 50_000 + rng.below(40_001) as i64 - 20_000).collect();
    let settings = CompareSettings { resamples: 300, seed: 4, level: 0.95, trials: 2100 };
    let c = compare::compare_values(&keys, &a, &b, 6, &settings, 2);
    let (sa, sb): (i64, i64) = (a.iter().sum(), b.iter().sum());
    let want = (sa - sb) as f64 / (n as f64 * 1e6);
    assert_eq!(c.difference, Some(want));
    assert!(want < -0.04 && want > -0.06, "{want}");
    assert_eq!((c.a.unwrap().mean, c.b.unwrap().mean), (sa as f64 / (n as f64 * 1e6), sb as f64 / (n as f64 * 1e6)));
    let i = c.interval.unwrap();
    assert!(i.low < want && want < i.high && i.high < 0.0, "{i:?} {want}");
    assert_eq!((i.method, i.resamples, i.seed), (crate::metric::compare::DIFFERENCE_METHOD, 300, 4));
    // Far from chance: no trial comes as far apart; p = 1 / (trials + 1).
    assert_eq!((c.extreme_trials, c.trials, c.p_value), (0, 2100, Some(1.0 / 2101.0)));
    // B against A: the same negated, the interval mirrored (tail-symmetric ranks).
    let r = compare::compare_values(&keys, &b, &a, 6, &settings, 1);
    assert_eq!(r.difference, Some(-want));
    assert_eq!((r.interval.unwrap().low, r.interval.unwrap().high), (-i.high, -i.low));
    // The replicates are the built-in weights of the keys: the interval is that of the paired
    // replicate mean differences, computed here from fill_weights.
    let mut d: Vec<f64> = (0..300)
        .map(|rep| {
            let (mut cnt, mut s) = (0i128, 0i128);
            for (k, (&x, &y)) in keys.iter().zip(a.iter().zip(&b)) {
                let mut w = [0u8; 300];
                fill_weights(*k, 4, &mut w);
                cnt += i128::from(w[rep]);
                s += i128::from(w[rep]) * i128::from(x - y);
            }
            s as f64 / (cnt as f64 * 1e6)
        })
        .collect();
    d.sort_by(f64::total_cmp);
    // k = ceil(0.025 x 300) = 8: d_(8) and d_(293).
    assert_eq!((i.low, i.high), (d[7], d[292]));

    // Close systems (noise only): the p-value's count equals the plain loop's, whatever the
    // threads.
    let close: Vec<i64> = a.iter().map(|&x| x + rng.below(40_001) as i64 - 20_000).collect();
    let want_c = naive_extreme(&keys, &a, &close, 2100, 4);
    assert!(want_c > 0 && want_c < 2100, "{want_c}");
    for threads in [1, 3] {
        assert_eq!(compare::compare_values(&keys, &a, &close, 6, &settings, threads).extreme_trials, want_c);
    }
    // Identical: no difference, every trial as far apart, p = 1.
    let same = compare::compare_values(&keys, &a, &a, 6, &settings, 1);
    assert_eq!((same.difference, same.extreme_trials, same.p_value), (Some(0.0), 2100, Some(1.0)));
    // Nothing in common: nothing to compare.
    let none = compare::compare_values(&[], &[], &[], 6, &settings, 1);
    assert_eq!((none.items, none.difference, none.interval, none.p_value), (0, None, None, None));
}

/// The normal-theory interval of a mean, by hand: values 1 and 3 (n = 2, mean 2, s = sqrt 2)
/// give 2 ± t(0.975, 1) · sqrt(2) / sqrt(2) = 2 ± 12.706; ten values use t(0.975, 9) = 2.262;
/// 41 values (40 degrees of freedom) use the normal quantile 1.96.
/// Quantiles: NIST/SEMATECH e-Handbook of Statistical Methods, tables 1.3.6.7.1 and 1.3.6.7.2.
#[test]
fn mean_interval_by_hand() {
    let mut s = ExternalSums::one(1).checked_add(&ExternalSums::one(3)).unwrap();
    let (lo, hi) = s.mean_interval(0).unwrap();
    assert!((lo - (2.0 - 12.706)).abs() < 1e-9 && (hi - (2.0 + 12.706)).abs() < 1e-9, "{lo} {hi}");
    assert_eq!(ExternalSums::one(1).mean_interval(0), None, "one value has no interval");
    // Ten values 0..=9 at two decimals (fixed 0, 100, ..., 900): mean 4.5, s^2 = 82.5/9.
    s = ExternalSums::default();
    for v in 0..10 {
        s = s.checked_add(&ExternalSums::one(v * 100)).unwrap();
    }
    let (lo, hi) = s.mean_interval(2).unwrap();
    let half = 2.262 * (82.5f64 / 9.0 / 10.0).sqrt();
    assert!((lo - (4.5 - half)).abs() < 1e-9 && (hi - (4.5 + half)).abs() < 1e-9, "{lo} {hi}");
    // 41 values, 20 of 0 and 21 of 2: mean 42/41, s^2 = (21 x 4 - 42^2/41) / 40.
    s = ExternalSums::default();
    for i in 0..41 {
        s = s.checked_add(&ExternalSums::one(if i < 20 { 0 } else { 2 })).unwrap();
    }
    let (mean, var) = (42.0 / 41.0, (84.0 - 42.0f64 * 42.0 / 41.0) / 40.0);
    let (lo, hi) = s.mean_interval(0).unwrap();
    let half = 1.96 * (var / 41.0).sqrt();
    assert!((lo - (mean - half)).abs() < 1e-9 && (hi - (mean + half)).abs() < 1e-9, "{lo} {hi}");
}
