//! Writing systems of letters and the target languages a session can declare.
//!
//! The script of a letter is read from its code point by the block ranges below (the Unicode
//! blocks of each writing system, Unicode 15); characters that are not letters (`char::is_alphabetic`
//! false: digits, punctuation, symbols, white space) have no script and are not counted.

/// A writing system, as far as the guards tell them apart.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum Script {
    /// Latin letters (basic, supplements, extended, IPA, full-width).
    Latin,
    /// Greek and Coptic.
    Greek,
    /// Cyrillic (with its supplement and extensions).
    Cyrillic,
    /// Hebrew.
    Hebrew,
    /// Arabic (with supplement, extended-A and presentation forms).
    Arabic,
    /// Devanagari.
    Devanagari,
    /// Thai.
    Thai,
    /// Hangul syllables and jamo.
    Hangul,
    /// Hiragana and katakana (full and half width).
    Kana,
    /// CJK ideographs (unified, extensions, compatibility) and the iteration mark U+3005.
    Han,
    /// A letter of any other writing system.
    Other,
}

impl Script {
    /// Lower-case name, as used in messages.
    pub fn name(self) -> &'static str {
        match self {
            Script::Latin => "latin",
            Script::Greek => "greek",
            Script::Cyrillic => "cyrillic",
            Script::Hebrew => "hebrew",
            Script::Arabic => "arabic",
            Script::Devanagari => "devanagari",
            Script::Thai => "thai",
            Script::Hangul => "hangul",
            Script::Kana => "kana",
            Script::Han => "han",
            Script::Other => "other",
        }
    }
}

/// The script of `c`, or `None` when `c` is not a letter.
pub fn script_of(c: char) -> Option<Script> {
    if c.is_ascii() {
        return c.is_ascii_alphabetic().then_some(Script::Latin);
    }
    if !c.is_alphabetic() {
        return None;
    }
    Some(match c as u32 {
        0x00C0..=0x02AF | 0x1D00..=0x1DBF | 0x1E00..=0x1EFF | 0x2C60..=0x2C7F | 0xA720..=0xA7FF | 0xAB30..=0xAB6F
        | 0xFF21..=0xFF3A | 0xFF41..=0xFF5A => Script::Latin,
        0x0370..=0x03FF | 0x1F00..=0x1FFF => Script::Greek,
        0x0400..=0x052F | 0x1C80..=0x1C8F | 0x2DE0..=0x2DFF | 0xA640..=0xA69F => Script::Cyrillic,
        0x0590..=0x05FF | 0xFB1D..=0xFB4F => Script::Hebrew,
        0x0600..=0x06FF | 0x0750..=0x077F | 0x08A0..=0x08FF | 0xFB50..=0xFDFF | 0xFE70..=0xFEFF => Script::Arabic,
        0x0900..=0x097F | 0xA8E0..=0xA8FF => Script::Devanagari,
        0x0E00..=0x0E7F => Script::Thai,
        0x1100..=0x11FF | 0x3130..=0x318F | 0xA960..=0xA97F | 0xAC00..=0xD7FF | 0xFFA0..=0xFFDC => Script::Hangul,
        0x3040..=0x30FF | 0x31F0..=0x31FF | 0xFF66..=0xFF9F => Script::Kana,
        0x3005 | 0x3007 | 0x3400..=0x4DBF | 0x4E00..=0x9FFF | 0xF900..=0xFAFF | 0x20000..=0x3134F => Script::Han,
        _ => Script::Other,
    })
}

/// A target language a session can declare: its ISO 639-1 and 639-3 codes, the scripts its
/// text is written in, and the language-identification libraries' names for it.
#[derive(Debug, PartialEq, Eq)]
pub struct Language {
    /// ISO 639-1 code (the name used in settings and output).
    pub code: &'static str,
    /// ISO 639-3 code (also accepted in settings).
    pub code3: &'static str,
    /// Scripts its letters are expected in.
    pub scripts: &'static [Script],
    /// The identification library's language (crate `whatlang`), `None` when it does not know
    /// the language (then only the script guard runs).
    pub ident: Option<whatlang::Lang>,
    /// The fast screening identifier's language (crate `whichlang`, 16 languages), `None` when
    /// it does not know the language (then `whatlang` decides alone).
    pub screen: Option<whichlang::Lang>,
    /// True when no other language `whatlang` knows is written in this language's scripts:
    /// text that passes the script check is then taken as in the language, unidentified.
    pub own_script: bool,
}

const LATIN: &[Script] = &[Script::Latin];
const CYRILLIC: &[Script] = &[Script::Cyrillic];

macro_rules! languages {
    ($(($c:literal, $c3:literal, $s:expr, $l:ident, $w:expr, $own:literal)),* $(,)?) => {
        /// Every language a session can declare as its target.
        pub static LANGUAGES: &[Language] = &[$(Language { code: $c, code3: $c3, scripts: $s, ident: Some(whatlang::Lang::$l), screen: $w, own_script: $own }),*];
    };
}

use whichlang::Lang as W;

// own_script: whatlang 0.18.0 writes Greek and Thai letters for one language each (its
// script-to-languages table); Hebrew letters also for Yiddish, Hangul and kana texts may be
// all ideographs (Chinese passes the script check of Korean and Japanese).
languages![
    ("en", "eng", LATIN, Eng, Some(W::Eng), false),
    ("de", "deu", LATIN, Deu, Some(W::Deu), false),
    ("fr", "fra", LATIN, Fra, Some(W::Fra), false),
    ("es", "spa", LATIN, Spa, Some(W::Spa), false),
    ("it", "ita", LATIN, Ita, Some(W::Ita), false),
    ("pt", "por", LATIN, Por, Some(W::Por), false),
    ("nl", "nld", LATIN, Nld, Some(W::Nld), false),
    ("sv", "swe", LATIN, Swe, Some(W::Swe), false),
    ("da", "dan", LATIN, Dan, None, false),
    ("nb", "nob", LATIN, Nob, None, false),
    ("fi", "fin", LATIN, Fin, None, false),
    ("et", "est", LATIN, Est, None, false),
    ("pl", "pol", LATIN, Pol, None, false),
    ("cs", "ces", LATIN, Ces, None, false),
    ("sk", "slk", LATIN, Slk, None, false),
    ("sl", "slv", LATIN, Slv, None, false),
    ("hr", "hrv", LATIN, Hrv, None, false),
    ("hu", "hun", LATIN, Hun, None, false),
    ("ro", "ron", LATIN, Ron, None, false),
    ("lt", "lit", LATIN, Lit, None, false),
    ("lv", "lav", LATIN, Lav, None, false),
    ("tr", "tur", LATIN, Tur, Some(W::Tur), false),
    ("id", "ind", LATIN, Ind, None, false),
    ("vi", "vie", LATIN, Vie, Some(W::Vie), false),
    ("ru", "rus", CYRILLIC, Rus, Some(W::Rus), false),
    ("uk", "ukr", CYRILLIC, Ukr, None, false),
    ("bg", "bul", CYRILLIC, Bul, None, false),
    ("mk", "mkd", CYRILLIC, Mkd, None, false),
    ("be", "bel", CYRILLIC, Bel, None, false),
    ("sr", "srp", &[Script::Cyrillic, Script::Latin], Srp, None, false),
    ("el", "ell", &[Script::Greek], Ell, None, true),
    ("he", "heb", &[Script::Hebrew], Heb, None, false),
    ("ar", "ara", &[Script::Arabic], Ara, Some(W::Ara), false),
    ("fa", "pes", &[Script::Arabic], Pes, None, false),
    ("ur", "urd", &[Script::Arabic], Urd, None, false),
    ("hi", "hin", &[Script::Devanagari], Hin, Some(W::Hin), false),
    ("th", "tha", &[Script::Thai], Tha, None, true),
    ("zh", "cmn", &[Script::Han], Cmn, Some(W::Cmn), false),
    ("ja", "jpn", &[Script::Kana, Script::Han], Jpn, Some(W::Jpn), false),
    ("ko", "kor", &[Script::Hangul, Script::Han], Kor, Some(W::Kor), false),
];

/// The language with ISO 639-1 or 639-3 code `code` (case-insensitive).
pub fn language(code: &str) -> Option<&'static Language> {
    let code = code.trim();
    LANGUAGES.iter().find(|l| l.code.eq_ignore_ascii_case(code) || l.code3.eq_ignore_ascii_case(code))
}

/// The ISO 639-1 codes of [`LANGUAGES`], comma separated (for messages and `--help`).
pub fn language_codes() -> String {
    LANGUAGES.iter().map(|l| l.code).collect::<Vec<_>>().join(",")
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn scripts_of_letters_by_hand() {
        // Invented words in each script; expected scripts read off the Unicode block charts.
        for (text, want) in [
            ("Fähre", Script::Latin),
            ("паром", Script::Cyrillic),
            ("πλοίο", Script::Greek),
            ("عبارة", Script::Arabic),
            ("מעבורת", Script::Hebrew),
            ("渡轮", Script::Han),
            ("フェリー", Script::Kana),
            ("ふね", Script::Kana),
            ("배", Script::Hangul),
            ("नौका", Script::Devanagari),
            ("เรือ", Script::Thai),
        ] {
            for c in text.chars() {
                // Combining marks (Arabic, Devanagari, Thai vowel signs) are alphabetic in
                // Unicode and belong to their block.
                if let Some(s) = script_of(c) {
                    assert_eq!(s, want, "{c:?} in {text}");
                }
            }
            assert!(text.chars().any(|c| script_of(c) == Some(want)));
        }
        for c in ['1', '٣', '.', '。', ' ', '€', '-'] {
            assert_eq!(script_of(c), None, "{c:?}");
        }
    }

    #[test]
    fn screen_languages_complete_and_own_scripts_unshared() {
        // Every language of the screening identifier that a session can declare has it set.
        for w in whichlang::LANGUAGES {
            let l = LANGUAGES.iter().find(|l| l.code3 == w.three_letter_code());
            assert_eq!(l.and_then(|l| l.screen), Some(w), "{}", w.three_letter_code());
        }
        // own_script: whatlang names its language for a text in that script whatever the text.
        for l in LANGUAGES.iter().filter(|l| l.own_script) {
            let sample = match l.code {
                "el" => "καλημέρα σας φίλοι μου",
                "th" => "สวัสดีครับ เพื่อนของผม",
                other => panic!("no sample for {other}"),
            };
            assert_eq!(whatlang::detect_lang(sample), l.ident, "{}", l.code);
            assert_eq!(whatlang::detect_script(sample).map(|s| s.langs().len()), Some(1), "{}", l.code);
        }
    }

    #[test]
    fn codes_resolve() {
        assert_eq!(language("de").map(|l| l.code3), Some("deu"));
        assert_eq!(language("RUS").map(|l| l.code), Some("ru"));
        assert!(language("xx").is_none());
        for l in LANGUAGES {
            assert_eq!(l.ident.map(|i| i.code()), Some(l.code3), "{}", l.code);
            // The screening identifier's language is the same (ISO 639-3 codes).
            if let Some(w) = l.screen {
                assert_eq!(w.three_letter_code(), l.code3);
            }
            assert_eq!(language(l.code), Some(l));
        }
    }
}
