//! The reference-free guards on a generated corpus: the demo's invented ferry notices (English
//! sources, German references) with pathologies injected at known rates by a seeded generator.
//! Counters must equal the injected counts exactly for empty, copy and repetition; script and
//! language within the tolerances stated below; flags on clean text below stated bounds.

use std::collections::BTreeSet;

use mtgauge::cli::demo::scenario::{demo_segments, demo_systems};
use mtgauge::guard::{check, Guard, GuardConfig, GuardCounts, GuardScratch, LengthTally, Verdict};
use mtgauge::rng::SplitMix64;

/// Invented notices in other scripts (written for this test): off-target output for a German
/// session. Cyrillic, Arabic, Chinese, Japanese, Greek.
const OTHER_SCRIPTS: [&str; 6] = [
    "Паром отправляется от третьего причала через десять минут, пожалуйста, пройдите на посадку.",
    "تغادر العبارة من الرصيف الثالث بعد عشر دقائق، يرجى التوجه إلى البوابة.",
    "渡轮将在十分钟后从三号码头出发，请前往登船口。",
    "フェリーは十分後に三番桟橋から出航します。搭乗口へお進みください。",
    "Το πλοίο αναχωρεί από την τρίτη προβλήτα σε δέκα λεπτά.",
    "Кафе на верхней палубе закрыто до прибытия в порт.",
];

#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord)]
enum Kind {
    Clean,
    Empty,
    Copy,
    Repetition,
    OffTargetLanguage,
    OtherScript,
    Truncated,
}

fn words(s: &str) -> BTreeSet<String> {
    s.split_whitespace().map(str::to_lowercase).collect()
}

/// Word-set overlap (Jaccard), to pick an unrelated source as off-target output.
fn overlap(a: &str, b: &str) -> f64 {
    let (a, b) = (words(a), words(b));
    a.intersection(&b).count() as f64 / a.union(&b).count().max(1) as f64
}

struct Item {
    kind: Kind,
    source: String,
    hyp: String,
}

fn corpus(n: usize, seed: u64) -> Vec<Item> {
    let segs = demo_segments();
    let mut rng = SplitMix64::new(seed);
    let mut items = Vec::with_capacity(n);
    for _ in 0..n {
        let i = rng.index(segs.len());
        let seg = &segs[i];
        let source = seg.source.clone().expect("demo segments have sources");
        let reference = seg.refs[rng.index(seg.refs.len())].clone();
        // Each pathology at 4%, the rest clean (rates: our choice).
        let roll = rng.below(100);
        let (kind, hyp) = match roll {
            0..=3 => (Kind::Empty, ["", " ", " . ", "…", "– –"][rng.index(5)].to_owned()),
            4..=7 => (Kind::Copy, source.clone()),
            8..=11 => {
                // A loop: a word of the reference repeated, or the reference's opening words
                // over and over (what a degenerate decoder emits).
                let ws: Vec<&str> = reference.split_whitespace().filter(|w| w.chars().any(char::is_alphanumeric)).collect();
                let hyp = if rng.chance(0.5) {
                    let w = ws[rng.index(ws.len())];
                    format!("{reference} {}", vec![w; 5].join(" "))
                } else {
                    let phrase = ws[..ws.len().min(3)].join(" ");
                    vec![phrase.as_str(); 4].join(" ")
                };
                (Kind::Repetition, hyp)
            }
            12..=15 => {
                // The English notice of an unrelated segment.
                let other = loop {
                    let j = rng.index(segs.len());
                    let s = segs[j].source.as_deref().unwrap_or_default();
                    if j != i && overlap(s, &source) < 0.2 {
                        break s.to_owned();
                    }
                };
                (Kind::OffTargetLanguage, other)
            }
            16..=19 => (Kind::OtherScript, OTHER_SCRIPTS[rng.index(OTHER_SCRIPTS.len())].to_owned()),
            20..=23 => {
                // The first fifth of the reference's characters.
                let keep = reference.chars().count() / 5;
                (Kind::Truncated, reference.chars().take(keep.max(1)).collect())
            }
            _ => (Kind::Clean, reference),
        };
        items.push(Item { kind, source, hyp });
    }
    items
}

/// German target, expected length ratio learned from the demo references and their sources.
fn config() -> GuardConfig {
    let mut tally = LengthTally::default();
    for s in demo_segments() {
        for r in &s.refs {
            tally.add(s.source.as_deref().unwrap_or_default(), r);
        }
    }
    let mut c = GuardConfig::default().with_target("de").expect("German is known");
    c.length_ratio = tally.ratio(c.length_min_chars).expect("the demo has text");
    c
}

fn verdicts(c: &GuardConfig, items: &[Item]) -> Vec<Verdict> {
    let mut scratch = GuardScratch::default();
    items.iter().map(|it| check(c, &it.source, &it.hyp, &mut scratch)).collect()
}

fn count(vs: impl IntoIterator<Item = Verdict>) -> GuardCounts {
    let mut n = GuardCounts::default();
    for v in vs {
        n.add(v);
    }
    n
}

#[test]
fn counters_match_injected_pathologies() {
    let c = config();
    let items = corpus(4000, 0x6775_6172_6473);
    let vs = verdicts(&c, &items);
    let all = count(vs.iter().copied());
    let injected = |k: Kind| items.iter().filter(|it| it.kind == k).count() as u64;
    let of_kind = |k: Kind| count(items.iter().zip(&vs).filter(|(it, _)| it.kind == k).map(|(_, v)| *v));
    eprintln!("expected length ratio (learned): {:.3}", c.length_ratio);
    for k in [Kind::Clean, Kind::Empty, Kind::Copy, Kind::Repetition, Kind::OffTargetLanguage, Kind::OtherScript, Kind::Truncated] {
        let n = of_kind(k);
        let row: Vec<String> = Guard::ALL.iter().map(|&g| format!("{g}={}/{}u", n.flagged_by(g), n.undecided_by(g))).collect();
        eprintln!("{k:?}: {} items; {}", n.checked, row.join(" "));
    }

    // Exact: every injected empty, copy and repetition flagged, nothing else.
    assert_eq!(all.flagged_by(Guard::Empty), injected(Kind::Empty));
    assert_eq!(all.flagged_by(Guard::Copy), injected(Kind::Copy));
    assert_eq!(all.flagged_by(Guard::Repetition), injected(Kind::Repetition));
    assert_eq!(of_kind(Kind::Empty).flagged_by(Guard::Empty), injected(Kind::Empty));
    assert_eq!(of_kind(Kind::Copy).flagged_by(Guard::Copy), injected(Kind::Copy));
    assert_eq!(of_kind(Kind::Repetition).flagged_by(Guard::Repetition), injected(Kind::Repetition));

    // Script: every other-script item flagged (tolerance 0: the rule needs no identifier), and
    // nothing in Latin letters is.
    assert_eq!(all.flagged_by(Guard::Script), injected(Kind::OtherScript));

    // Language, stated tolerance: the identifier decides on at least half of the off-target
    // English notices (the rest: not reliable by whatlang 0.18.0's own flag, or too short) and
    // flags at least 95% of those it decides on; every other-script item with enough letters is
    // flagged by the script rule.
    let off = of_kind(Kind::OffTargetLanguage);
    let decided = off.checked - off.undecided_by(Guard::Language);
    assert!(decided * 2 >= off.checked, "{off:?}");
    assert!(off.flagged_by(Guard::Language) * 100 >= decided * 95, "{off:?}");
    let scripts = of_kind(Kind::OtherScript);
    assert_eq!(scripts.flagged_by(Guard::Language) + scripts.undecided_by(Guard::Language), scripts.checked);

    // Length: every truncated item flagged (a fifth of the reference is far outside the band
    // around the learned ratio).
    let cut = of_kind(Kind::Truncated);
    assert_eq!(cut.flagged_by(Guard::Length) + cut.undecided_by(Guard::Length), cut.checked);
    assert!(cut.flagged_by(Guard::Length) > 0);
}

/// Flags on clean text: the demo's references (both wordings of all 300 notices) and the good
/// simulated system's output as hypotheses of their English sources.
#[test]
fn false_positive_rates_on_clean_text() {
    let c = config();
    let segs = demo_segments();
    let mut items = Vec::new();
    for s in &segs {
        for r in &s.refs {
            items.push(Item { kind: Kind::Clean, source: s.source.clone().unwrap_or_default(), hyp: r.clone() });
        }
    }
    let good = &demo_systems()[0];
    for (s, h) in segs.iter().zip(&good.hypotheses) {
        items.push(Item { kind: Kind::Clean, source: s.source.clone().unwrap_or_default(), hyp: h.clone() });
    }
    let n = count(verdicts(&c, &items));
    for g in Guard::ALL {
        eprintln!("clean {g}: {} flagged, {} undecided of {}", n.flagged_by(g), n.undecided_by(g), n.checked);
    }
    // Bounds (ours): none of the rule-exact guards fires on clean text; length and language,
    // which depend on statistics of the text, under 2% of the items.
    for g in [Guard::Empty, Guard::Copy, Guard::Repetition, Guard::Script] {
        assert_eq!(n.flagged_by(g), 0, "{g}");
    }
    for g in [Guard::Length, Guard::Language] {
        assert!(n.flagged_by(g) * 50 < n.checked, "{g}: {} of {}", n.flagged_by(g), n.checked);
    }
}

/// The counters of a corpus split into batches, checked in any order, add up to the whole.
#[test]
fn counts_add_across_batches_and_order() {
    let c = config();
    let items = corpus(600, 7);
    let whole = count(verdicts(&c, &items));
    let mut rng = SplitMix64::new(11);
    let mut order: Vec<usize> = (0..items.len()).collect();
    for i in (1..order.len()).rev() {
        order.swap(i, rng.index(i + 1));
    }
    let shuffled: Vec<Item> =
        order.iter().map(|&i| Item { kind: items[i].kind, source: items[i].source.clone(), hyp: items[i].hyp.clone() }).collect();
    let mut sum = GuardCounts::default();
    for batch in shuffled.chunks(37) {
        sum += count(verdicts(&c, batch));
    }
    assert_eq!(sum, whole);
    assert!(whole.flagged.iter().sum::<u64>() > 0);
}

/// The language guard's vocabulary as a session learns it from the demo's German references
/// (`mtgauge::guard::vocab::learn`), checked on the same generated corpus.
#[test]
fn the_learned_vocabulary_screen() {
    use mtgauge::guard::vocab::{learn, Learned};
    let plain = config();
    let segs = demo_segments();
    let refs: Vec<&str> = segs.iter().flat_map(|s| s.refs.iter().map(String::as_str)).collect();
    let Learned::Vocabulary(v) = learn(&plain, &refs) else { panic!("German references give a German vocabulary") };
    // English "references" for a German target are refused (they are identified as English),
    // as is a target its script decides and a session without a target.
    let sources: Vec<&str> = segs.iter().filter_map(|s| s.source.as_deref()).collect();
    assert!(matches!(learn(&plain, &sources), Learned::Skipped(why) if why.contains("target language")));
    assert!(matches!(learn(&GuardConfig::default().with_target("el").expect("Greek is known"), &refs), Learned::Skipped(_)));
    assert!(matches!(learn(&GuardConfig::default(), &refs), Learned::Skipped(_)));

    // The default threshold's margin (mtgauge::guard::DEFAULT_LANGUAGE_VOCAB_SHARE, our choice):
    // every German hypothesis of the three simulated systems has at least that share of its
    // words in the vocabulary, every English source at most 0.5.
    let share = mtgauge::guard::DEFAULT_LANGUAGE_VOCAB_SHARE;
    let german_min = demo_systems().iter().flat_map(|s| s.hypotheses.iter()).filter_map(|h| v.share(h)).fold(1.0f64, f64::min);
    let english_max = sources.iter().filter_map(|s| v.share(s)).fold(0.0f64, f64::max);
    eprintln!("vocabulary {} words; German hypotheses' share at least {german_min:.3}, English sources' at most {english_max:.3}", v.len());
    assert!(german_min >= share, "{german_min}");
    assert!(english_max <= 0.5, "{english_max}");

    // On the generated corpus: every guard but language gives the verdicts it gives without
    // the vocabulary; language keeps the stated tolerance on off-target English (decides on at
    // least half, flags at least 95% of those) and passes every clean item the identifiers pass.
    let c = GuardConfig { vocabulary: Some(std::sync::Arc::new(v)), ..plain.clone() };
    let items = corpus(4000, 0x6775_6172_6473);
    let (with, without) = (verdicts(&c, &items), verdicts(&plain, &items));
    let lang = 1u8 << (Guard::Language as u8);
    for (a, b) in with.iter().zip(&without) {
        assert_eq!((a.flagged & !lang, a.undecided & !lang), (b.flagged & !lang, b.undecided & !lang));
    }
    let of_kind = |vs: &[Verdict], k: Kind| count(items.iter().zip(vs).filter(|(it, _)| it.kind == k).map(|(_, v)| *v));
    let off = of_kind(&with, Kind::OffTargetLanguage);
    let decided = off.checked - off.undecided_by(Guard::Language);
    assert!(decided * 2 >= off.checked, "{off:?}");
    assert!(off.flagged_by(Guard::Language) * 100 >= decided * 95, "{off:?}");
    assert_eq!(off, of_kind(&without, Kind::OffTargetLanguage), "no off-target English passes the screen");
    let (clean_with, clean_without) = (of_kind(&with, Kind::Clean), of_kind(&without, Kind::Clean));
    eprintln!("clean language verdicts: with the vocabulary {clean_with:?}, without {clean_without:?}");
    assert_eq!(clean_with.flagged_by(Guard::Language), 0);
    assert!(clean_with.undecided_by(Guard::Language) <= clean_without.undecided_by(Guard::Language));
}
