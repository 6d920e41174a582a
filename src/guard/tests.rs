//! Hand-made cases per guard in Latin, Cyrillic, CJK and Arabic scripts (all sentences invented
//! for this project: notices of the fictional Nordhavn ferries), and property tests.

use super::*;
use proptest::prelude::*;

const EN: &str = "The ferry to North Harbour leaves at 10:15 from pier three.";
const DE: &str = "Die Fähre nach Nordhafen legt um 10:15 Uhr am Anleger drei ab.";
const RU: &str = "Паром в Северную гавань отправляется в 10:15 от третьего причала.";
const ZH: &str = "前往北港的渡轮将于10:15从三号码头出发。";
const JA: &str = "北港行きのフェリーは10時15分に三番桟橋から出航します。";
const AR: &str = "تغادر العبارة إلى الميناء الشمالي في الساعة 10:15 من الرصيف الثالث.";
// Longer texts for the language guard (above DEFAULT_LANGUAGE_MIN_LETTERS letters).
const EN_LONG: &str = "Because of the strong wind this evening, the last ferry to North Harbour will leave one hour earlier than planned, and the cafe on the upper deck stays closed.";
const DE_LONG: &str = "Wegen des starken Windes fährt die letzte Fähre nach Nordhafen heute Abend eine Stunde früher als geplant ab, und das Café auf dem Oberdeck bleibt geschlossen.";
const RU_LONG: &str = "Из-за сильного ветра последний паром в Северную гавань сегодня вечером отправится на час раньше, чем планировалось, а кафе на верхней палубе будет закрыто.";

fn cfg(target: &str) -> GuardConfig {
    GuardConfig::default().with_target(target).unwrap()
}

fn verdict(c: &GuardConfig, src: &str, hyp: &str) -> Verdict {
    check(c, src, hyp, &mut GuardScratch::default())
}

fn flagged(c: &GuardConfig, src: &str, hyp: &str) -> Vec<&'static str> {
    verdict(c, src, hyp).flagged_guards().map(Guard::name).collect()
}

#[test]
fn good_translations_trip_nothing() {
    for (target, hyp) in [("de", DE), ("ru", RU), ("zh", ZH), ("ja", JA), ("ar", AR), ("de", DE_LONG), ("ru", RU_LONG)] {
        let mut c = cfg(target);
        // Chinese and Japanese are about a third as many characters as English (expected ratio
        // configured for the pair; the length guard compares against it).
        if matches!(target, "zh" | "ja") {
            c.length_ratio = 0.4;
        }
        let src = if [DE_LONG, RU_LONG].contains(&hyp) { EN_LONG } else { EN };
        assert_eq!(flagged(&c, src, hyp), Vec::<&str>::new(), "{target}: {hyp}");
    }
}

#[test]
fn empty_in_every_script() {
    let c = cfg("ar");
    for hyp in ["", "   \t", "…!?", "。。「」", "؟ ، ؛", "— -- ..."] {
        assert!(verdict(&c, AR, hyp).is_flagged(Guard::Empty), "{hyp:?}");
    }
    // Digits are content, in any script (Arabic-Indic three, full-width one).
    for hyp in ["٣", "１", "0", "ab"] {
        assert!(!verdict(&c, AR, hyp).is_flagged(Guard::Empty), "{hyp:?}");
    }
}

#[test]
fn copy_exact_after_normalisation_and_by_chrf() {
    // Exact after lowercasing and dropping punctuation and spaces, in four scripts.
    for (target, src) in [("de", EN), ("en", RU), ("en", ZH), ("en", AR)] {
        let c = cfg(target);
        assert!(verdict(&c, src, src).is_flagged(Guard::Copy), "{src}");
        let shouted: String = src.to_uppercase().replace(['.', ':', '。'], " ");
        assert!(verdict(&c, src, &shouted).is_flagged(Guard::Copy), "{shouted}");
    }
    // Mostly the source with a word or two appended: chrF against the source stays high.
    let c = cfg("de");
    assert!(verdict(&c, EN, &format!("{EN} Danke.")).is_flagged(Guard::Copy));
    // A real translation shares names and numbers, not 80 chrF points.
    assert!(!verdict(&c, EN, DE).is_flagged(Guard::Copy));
    // The threshold is a setting: at 10 the German translation counts as a copy of the English.
    let mut low = c.clone();
    low.set("copy-chrf=10").unwrap();
    assert!(verdict(&low, EN, DE).is_flagged(Guard::Copy));
    // A source without letters or digits cannot be copied recognisably.
    assert!(verdict(&c, "...", "...").is_undecided(Guard::Copy));
}

#[test]
fn length_band_against_the_expected_ratio() {
    let c = cfg("de");
    // Truncated: 9 of about 50 source characters.
    assert!(verdict(&c, EN, "Die Fähre").is_flagged(Guard::Length));
    // Run on: the German sentence three times (ratio about 3.6).
    assert!(verdict(&c, EN, &format!("{DE} {DE} {DE}")).is_flagged(Guard::Length));
    assert!(!verdict(&c, EN, DE).is_flagged(Guard::Length));
    // Chinese is short against English: flagged at the default expected ratio 1, not at 0.4.
    let mut zh = cfg("zh");
    assert!(verdict(&zh, EN, ZH).is_flagged(Guard::Length));
    zh.set("length-ratio=0.4").unwrap();
    assert!(!verdict(&zh, EN, ZH).is_flagged(Guard::Length));
    // Arabic and Cyrillic against English are within the band.
    assert!(!verdict(&cfg("ar"), EN, AR).is_flagged(Guard::Length));
    assert!(!verdict(&cfg("ru"), EN, RU).is_flagged(Guard::Length));
    // Sources under the minimum are undecided.
    assert!(verdict(&c, "Gate 4B", "Tor 4B, bitte sofort einsteigen").is_undecided(Guard::Length));
}

#[test]
fn repetition_of_ngrams_and_runs_in_four_scripts() {
    let loops = [
        ("de", "Die Fähre fährt ab, die Fähre fährt ab, die Fähre fährt ab, die Fähre fährt ab"),
        ("ru", "Паром паром паром паром отправляется."),
        ("zh", "渡轮渡轮渡轮渡轮渡轮"),
        ("ar", "الرصيف الرصيف الرصيف الرصيف"),
    ];
    for (target, hyp) in loops {
        let c = cfg(target);
        assert!(verdict(&c, EN, hyp).is_flagged(Guard::Repetition), "{hyp}");
        // The same repetition in the source is not the system's fault.
        assert!(!verdict(&c, hyp, hyp).is_flagged(Guard::Repetition), "{hyp}");
    }
    // Three repeats of a word, not in a row, and a 4-gram twice: not enough.
    let c = cfg("de");
    assert!(!verdict(&c, EN, "Die Fähre, die Brücke und die Mole sind heute gesperrt.").is_flagged(Guard::Repetition));
    assert!(!verdict(&c, EN, "Die Fähre fährt ab und die Fähre fährt ab.").is_flagged(Guard::Repetition));
    // Punctuation runs are not words.
    assert!(!verdict(&c, EN, "Abfahrt . . . . . 10:15").is_flagged(Guard::Repetition));
    // The order is a setting: bigrams repeated three times flag at order 2.
    let mut c2 = c.clone();
    c2.set("repeat-order=2").unwrap();
    assert!(verdict(&c2, EN, "Die Fähre und die Fähre und die Fähre.").is_flagged(Guard::Repetition));
    assert!(!verdict(&c, EN, "Die Fähre und die Fähre und die Fähre.").is_flagged(Guard::Repetition));
}

#[test]
fn script_of_the_letters_against_the_target() {
    // Wrong script, whatever the length.
    assert!(verdict(&cfg("ru"), EN, "Fähre").is_flagged(Guard::Script));
    assert!(verdict(&cfg("de"), EN, RU).is_flagged(Guard::Script));
    assert!(verdict(&cfg("ar"), EN, ZH).is_flagged(Guard::Script));
    assert!(verdict(&cfg("zh"), EN, AR).is_flagged(Guard::Script));
    // Japanese mixes kana and ideographs; Korean Hangul and Han; a Latin brand name in Arabic
    // text stays under half of the letters.
    assert!(!verdict(&cfg("ja"), EN, JA).is_flagged(Guard::Script));
    assert!(!verdict(&cfg("ko"), EN, "북항행 페리는 10시 15분에 출발합니다.").is_flagged(Guard::Script));
    assert!(!verdict(&cfg("ar"), EN, "شبكة Wi-Fi مجانية على متن العبارة").is_flagged(Guard::Script));
    // Without letters or without a target: undecided.
    assert!(verdict(&cfg("de"), EN, "10:15").is_undecided(Guard::Script));
    assert!(verdict(&GuardConfig::default(), EN, DE).is_undecided(Guard::Script));
}

#[test]
fn language_identified_or_undecided() {
    // English where German is due; Russian where German is due (also the script guard: text
    // mostly in another script is off-target whatever the identifier's confidence).
    assert!(verdict(&cfg("de"), EN_LONG, EN_LONG).is_flagged(Guard::Language));
    let v = verdict(&cfg("de"), EN_LONG, RU_LONG);
    assert!(v.is_flagged(Guard::Language) && v.is_flagged(Guard::Script));
    assert!(!verdict(&cfg("de"), EN_LONG, DE_LONG).any());
    // German text in a German session passes the screen (decided, not flagged).
    assert!(!verdict(&cfg("de"), EN_LONG, DE_LONG).is_undecided(Guard::Language));
    // The screen never flags: English in an English session passes, in a German one the
    // thorough identifier flags it; a target the screen does not know (Danish) goes to the
    // thorough identifier alone, which flags the German text.
    assert!(!verdict(&cfg("en"), DE_LONG, EN_LONG).is_flagged(Guard::Language));
    assert!(verdict(&cfg("da"), EN_LONG, DE_LONG).is_flagged(Guard::Language));
    // Greek letters are written for Greek alone: a Greek session passes Greek text without an
    // identifier, even with identification off; Russian text there is flagged by its script.
    let el_text = "Το τελευταίο πλοίο για το Βόρειο Λιμάνι αναχωρεί απόψε μία ώρα νωρίτερα.";
    let mut el_off = cfg("el");
    el_off.set("language-id=off").unwrap();
    for c in [cfg("el"), el_off.clone()] {
        let v = verdict(&c, EN_LONG, el_text);
        assert!(!v.is_flagged(Guard::Language) && !v.is_undecided(Guard::Language));
    }
    assert!(verdict(&el_off, EN_LONG, RU_LONG).is_flagged(Guard::Language));
    // Short texts are undecided, never flagged, even in the wrong language.
    let v = verdict(&cfg("de"), EN, "The ferry leaves now.");
    assert!(v.is_undecided(Guard::Language) && !v.is_flagged(Guard::Language));
    // No declared target: undecided.
    assert!(verdict(&GuardConfig::default(), EN_LONG, EN_LONG).is_undecided(Guard::Language));
    // Identification switched off: wrong-script text is still flagged, the rest undecided.
    let mut off = cfg("de");
    off.set("language-id=off").unwrap();
    assert!(verdict(&off, EN_LONG, EN_LONG).is_undecided(Guard::Language));
    assert!(verdict(&off, EN_LONG, RU_LONG).is_flagged(Guard::Language));
    assert!(matches!(off.set("language-id=maybe"), Err(GuardError::BadValue { .. })));
}

#[test]
fn an_item_can_trip_several_guards() {
    // The English source copied into a German session: copy and language.
    let got = flagged(&cfg("de"), EN_LONG, EN_LONG);
    assert_eq!(got, ["copy", "language"]);
    // Empty output: empty and length.
    assert_eq!(flagged(&cfg("de"), EN, ""), ["empty", "length"]);
}

#[test]
fn settings_parse_and_reject() {
    let mut c = GuardConfig::default();
    for s in SETTING_KEYS {
        assert!(settings_help().contains(&format!("{s}=")), "{s} missing from the help");
    }
    c.set("repeat-count = 5").unwrap();
    assert_eq!(c.repeat_count, 5);
    assert!(matches!(c.set("repeat-count=1"), Err(GuardError::BadValue { .. })));
    assert!(matches!(c.set("copy-chrf=101"), Err(GuardError::BadValue { .. })));
    assert!(matches!(c.set("colour=red"), Err(GuardError::UnknownSetting(_))));
    assert!(matches!(c.set("copy-chrf"), Err(GuardError::Malformed(_))));
    assert!(matches!(GuardConfig::default().with_target("tlh"), Err(GuardError::UnknownLanguage(_))));
}

#[test]
fn learned_length_ratio() {
    let mut t = LengthTally::default();
    t.add(EN, DE);
    let mut u = LengthTally::default();
    u.add(EN_LONG, DE_LONG);
    let mut both = t;
    both.source_chars += u.source_chars;
    both.reference_chars += u.reference_chars;
    let want = (char_len(DE) + char_len(DE_LONG)) as f64 / (char_len(EN) + char_len(EN_LONG)) as f64;
    assert_eq!(both.ratio(1), Some(want));
    assert_eq!(LengthTally::default().ratio(1), None);
}

#[test]
fn counts_by_hand() {
    // No declared target: script and language are undecided for every item.
    let c = GuardConfig::default();
    let mut n = GuardCounts::default();
    for hyp in ["", DE, EN] {
        n.add(verdict(&c, EN, hyp));
    }
    assert_eq!(n.checked, 3);
    assert_eq!(n.flagged_by(Guard::Empty), 1);
    assert_eq!(n.flagged_by(Guard::Copy), 1);
    assert_eq!(n.flagged_by(Guard::Length), 1);
    assert_eq!(n.undecided_by(Guard::Language), 3);
    assert_eq!(n.undecided_by(Guard::Script), 3);
    assert_eq!(n.rate(Guard::Language), None);
    assert_eq!(n.rate(Guard::Empty), Some(1.0 / 3.0));
}

fn any_text() -> impl Strategy<Value = String> {
    prop_oneof![
        "\\PC{0,40}",
        "(Fähre|паром|渡轮|عبارة|フェリー|[a-z]{1,6}| |\\.|1)*",
        Just(String::new()),
    ]
}

proptest! {
    #[test]
    fn no_panic_on_any_utf8(src in any::<String>(), hyp in any::<String>(), order in 1usize..=8) {
        let mut c = cfg("de");
        c.repeat_order = order;
        c.copy_order = order;
        let v = check(&c, &src, &hyp, &mut GuardScratch::default());
        prop_assert_eq!(v.flagged & v.undecided, 0);
    }

    #[test]
    fn one_pass_check_equals_the_guards_one_by_one(
        src in any_text(),
        hyp in prop_oneof![any_text(), any::<String>(), "((Fähre|паром|渡轮|abc) ){0,12}"],
        target in prop_oneof![Just("de"), Just("ru"), Just("zh"), Just("ar"), Just("ja")],
        order in 1usize..=8,
    ) {
        // check() reads each text once; check_by_guard() runs each documented rule on its own.
        // A vocabulary of the source's words and a few more, so the screen decides some items.
        let mut c = cfg(target);
        c.vocabulary = Some(Arc::new(Vocabulary::of_texts([src.as_str(), "Fähre паром 渡轮 abc"])));
        c.repeat_order = order;
        c.copy_order = order;
        c.repeat_count = 2;
        c.repeat_run = 2;
        let mut s = GuardScratch::default();
        prop_assert_eq!(check(&c, &src, &hyp, &mut s), check_by_guard(&c, &src, &hyp, &mut GuardScratch::default()));
        // And with the source copied, which takes the copy chrF path.
        let near = format!("{hyp} {src}");
        prop_assert_eq!(check(&c, &src, &near, &mut s), check_by_guard(&c, &src, &near, &mut GuardScratch::default()));
        // And an exact copy after normalisation (case and punctuation changed).
        let copied = format!("¡{}!", src.to_uppercase());
        prop_assert_eq!(check(&c, &src, &copied, &mut s), check_by_guard(&c, &src, &copied, &mut GuardScratch::default()));
    }

    #[test]
    fn one_pass_words_equal_the_word_definition(
        text in prop_oneof![any_text(), any::<String>(), "(Straße|ÄÖÜ|ñandú|x1Y2|abcdefghijklmnopq|€|„|–|渡轮| |\\.|\t|Ferry to the Harbour, 10:15\\.)*"],
        src in prop_oneof![any_text(), "(ferry|Fähre|harbour| |\\.|\n)*"],
    ) {
        // The hypothesis scan's words and vocabulary counts are the definition's (for_each_word).
        let vocab = Vocabulary::of_texts(["straße äöü abcdefghijklmnopq 渡"]);
        let mut c = cfg("de");
        c.vocabulary = Some(Arc::new(vocab.clone()));
        let mut ids = Vec::new();
        let facts = SourceFacts::of(&src);
        let h = scan::scan_hypothesis(&text, &[Script::Latin], &facts.presence, Some(&vocab), &mut ids, &mut Default::default());
        let mut want = Vec::new();
        word_ids(&text, &mut want);
        prop_assert_eq!(&ids, &want);
        prop_assert_eq!(Some((h.known, h.lettered)), vocabulary_counts(&c, &text));
        prop_assert_eq!(h.chars, char_len(&text));
        prop_assert_eq!(h.alnum_lower, alnum_lower(&text).count());
        prop_assert_eq!(h.lower, fill_chars(&text, 0, &mut Vec::new()));
        // The pair probes and the source's facts, against the filled characters.
        let (mut hf, mut sf) = (Vec::new(), Vec::new());
        fill_chars(&text, 0, &mut hf);
        fill_chars(&src, 0, &mut sf);
        prop_assert_eq!(h.hits, presence_hits(&hf, &sf));
        prop_assert_eq!((facts.chars, facts.lower, facts.alnum_lower), (char_len(&src), sf.len(), alnum_lower(&src).count()));
        prop_assert_eq!(h.letters, text.chars().filter(|&c| script_of(c).is_some()).count());
    }

    #[test]
    fn the_sixteen_byte_path_equals_the_eight_byte_path(
        text in prop_oneof![
            r"([a-zA-Z0-9]{1,12}|[ \t\n\x0B\x0C\r\x1C-\x1F]{1,3}|[!-/:-@\[-`{-~]|ä|ß|É|€|渡){0,40}",
            r"[\x00-\x7F]{0,80}",
            any_text(),
            any::<String>(),
        ],
        src in prop_oneof![any_text(), r"[\x00-\x7F]{0,80}", r"(ferry|Fähre|harbour| |\.|\n)*"],
    ) {
        // scan_hypothesis takes the sixteen-byte path where the processor has it (x86-64 with
        // SSSE3, POPCNT, BMI1, BMI2 and LZCNT); the eight-byte path is the one on every other. Same scan, same words.
        let vocab = Vocabulary::of_texts(["straße äöü abcdefghijklmnopq 渡", src.as_str()]);
        let facts = SourceFacts::of(&src);
        // Texts made of the source too, so that pairs across white space hit its set.
        let spaced: String = src.chars().flat_map(|c| [c, ' ']).collect();
        for text in [text.clone(), format!("{src} {text}"), src.replace(' ', "  \t"), spaced] {
            let (mut ids, mut ids_portable) = (Vec::new(), Vec::new());
            let h = scan::scan_hypothesis(&text, &[Script::Latin], &facts.presence, Some(&vocab), &mut ids, &mut Default::default());
            let p = scan::scan_hypothesis_portable(&text, &[Script::Latin], &facts.presence, Some(&vocab), &mut ids_portable, &mut Default::default());
            prop_assert_eq!(h, p);
            prop_assert_eq!(ids, ids_portable);
            let (mut hf, mut sf) = (Vec::new(), Vec::new());
            fill_chars(&text, 0, &mut hf);
            fill_chars(&src, 0, &mut sf);
            prop_assert_eq!(h.hits, presence_hits(&hf, &sf));
        }
    }

    #[test]
    fn copy_bound_never_below_the_exact_chrf(src in any_text(), hyp in any_text(), n in 1usize..=10) {
        let mut s = GuardScratch::default();
        let (hl, sl) = (fill_chars(&hyp, n, &mut s.hyp_chars), fill_chars(&src, n, &mut s.src_chars));
        let bound = copy_bound(n, hl, sl, &mut s);
        let exact = copy_chrf(n, hl, sl, &mut s);
        prop_assert!(bound + 1e-9 >= exact, "bound {} < chrF {}", bound, exact);
        let presence = presence_bound(n, &s.hyp_chars[..hl], &s.src_chars[..sl]);
        prop_assert!(presence + 1e-9 >= exact, "presence bound {} < chrF {}", presence, exact);
        // The buckets are left zero for the next item.
        prop_assert!(s.buckets.iter().all(|&b| b == 0));
    }

    #[test]
    fn verdicts_independent_of_order_split_and_scratch(
        items in proptest::collection::vec((any_text(), any_text()), 0..12),
        cut in 0usize..12,
        target in prop_oneof![Just("de"), Just("ru"), Just("zh"), Just("ar")],
    ) {
        let c = cfg(target);
        let fresh: Vec<Verdict> = items.iter().map(|(s, h)| check(&c, s, h, &mut GuardScratch::default())).collect();
        // One scratch reused, items in reverse order.
        let mut scratch = GuardScratch::default();
        let mut reversed: Vec<Verdict> = items.iter().rev().map(|(s, h)| check(&c, s, h, &mut scratch)).collect();
        reversed.reverse();
        prop_assert_eq!(&fresh, &reversed);
        // Counts of two batches add up to the counts of the whole, in either order.
        let cut = cut.min(items.len());
        let count = |vs: &[Verdict]| { let mut n = GuardCounts::default(); for &v in vs { n.add(v); } n };
        let whole = count(&fresh);
        let (mut a, b) = (count(&fresh[..cut]), count(&fresh[cut..]));
        let mut b2 = b;
        b2 += a;
        a += b;
        prop_assert_eq!(a, whole);
        prop_assert_eq!(b2, whole);
        prop_assert_eq!(whole.checked, items.len() as u64);
    }

    #[test]
    fn copy_bound_on_similar_texts(words in proptest::collection::vec("(Fähre|ferry|паром|渡轮|[a-z]{1,5})", 1..12), keep in 0usize..12) {
        // Near copies (a prefix of the words kept, the rest changed): the bound still holds.
        let src = words.join(" ");
        let hyp = words.iter().enumerate().map(|(i, w)| if i < keep { w.clone() } else { w.to_uppercase() + "x" }).collect::<Vec<_>>().join(" ");
        let mut s = GuardScratch::default();
        let (hl, sl) = (fill_chars(&hyp, 6, &mut s.hyp_chars), fill_chars(&src, 6, &mut s.src_chars));
        prop_assert!(presence_bound(6, &s.hyp_chars[..hl], &s.src_chars[..sl]) + 1e-9 >= copy_chrf(6, hl, sl, &mut s));
        prop_assert!(copy_bound(6, hl, sl, &mut s) + 1e-9 >= copy_chrf(6, hl, sl, &mut s));
    }
}


#[test]
fn words_of_the_repetition_guard() {
    let ids = |t: &str| {
        let mut v = Vec::new();
        word_ids(t, &mut v);
        v
    };
    // Case and punctuation do not make words differ; punctuation is no word.
    let w = ids("Fähre, FÄHRE! ... fähre");
    assert_eq!(w.len(), 3);
    assert!(w.iter().all(|&x| x == w[0]));
    // Each ideograph a word; kana too; CJK punctuation none.
    assert_eq!(ids("渡轮。フェ").len(), 4);
    // A Devanagari word with vowel signs and a virama (marks) stays one word; Arabic too.
    assert_eq!(ids("नौका प्रस्थान").len(), 2);
    assert_eq!(ids("الرصيف الثالث").len(), 2);
    assert_eq!(ids("паром-паром").len(), 2);
    assert!(ids(" \t.,;").is_empty());
}
