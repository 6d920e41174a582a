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
/// text is written in, and the language-identification library's name for it.
#[derive(Debug, PartialEq, Eq)]
pub struct Language {
    /// ISO 639-1 code (the name used in settings and output).
    pub code: &'static str,
    /// ISO 639-3 code (also accepted in settings).
    pub code3: &'static str,
    /// Scripts its letters are expected in.
    pub scripts: &'static [Script],
    /// The identification library's language, `None` when it does not know the language (then
    /// only the script guard runs).
    pub ident: Option<whatlang::Lang>,
}

const LATIN: &[Script] = &[Script::Latin];
const CYRILLIC: &[Script] = &[Script::Cyrillic];

macro_rules! languages {
    ($(($c:literal, $c3:literal, $s:expr, $l:ident)),* $(,)?) => {
        /// Every language a session can declare as its target.
        pub static LANGUAGES: &[Language] = &[$(Language { code: $c, code3: $c3, scripts: $s, ident: Some(whatlang::Lang::$l) }),*];
    };
}

languages![
    ("en", "eng", LATIN, Eng),
    ("de", "deu", LATIN, Deu),
    ("fr", "fra", LATIN, Fra),
    ("es", "spa", LATIN, Spa),
    ("it", "ita", LATIN, Ita),
    ("pt", "por", LATIN, Por),
    ("nl", "nld", LATIN, Nld),
    ("sv", "swe", LATIN, Swe),
    ("da", "dan", LATIN, Dan),
    ("nb", "nob", LATIN, Nob),
    ("fi", "fin", LATIN, Fin),
    ("et", "est", LATIN, Est),
    ("pl", "pol", LATIN, Pol),
    ("cs", "ces", LATIN, Ces),
    ("sk", "slk", LATIN, Slk),
    ("sl", "slv", LATIN, Slv),
    ("hr", "hrv", LATIN, Hrv),
    ("hu", "hun", LATIN, Hun),
    ("ro", "ron", LATIN, Ron),
    ("lt", "lit", LATIN, Lit),
    ("lv", "lav", LATIN, Lav),
    ("tr", "tur", LATIN, Tur),
    ("id", "ind", LATIN, Ind),
    ("vi", "vie", LATIN, Vie),
    ("ru", "rus", CYRILLIC, Rus),
    ("uk", "ukr", CYRILLIC, Ukr),
    ("bg", "bul", CYRILLIC, Bul),
    ("mk", "mkd", CYRILLIC, Mkd),
    ("be", "bel", CYRILLIC, Bel),
    ("sr", "srp", &[Script::Cyrillic, Script::Latin], Srp),
    ("el", "ell", &[Script::Greek], Ell),
    ("he", "heb", &[Script::Hebrew], Heb),
    ("ar", "ara", &[Script::Arabic], Ara),
    ("fa", "pes", &[Script::Arabic], Pes),
    ("ur", "urd", &[Script::Arabic], Urd),
    ("hi", "hin", &[Script::Devanagari], Hin),
    ("th", "tha", &[Script::Thai], Tha),
    ("zh", "cmn", &[Script::Han], Cmn),
    ("ja", "jpn", &[Script::Kana, Script::Han], Jpn),
    ("ko", "kor", &[Script::Hangul, Script::Han], Kor),
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
    fn codes_resolve() {
        assert_eq!(language("de").map(|l| l.code3), Some("deu"));
        assert_eq!(language("RUS").map(|l| l.code), Some("ru"));
        assert!(language("xx").is_none());
        for l in LANGUAGES {
            assert_eq!(l.ident.map(|i| i.code()), Some(l.code3), "{}", l.code);
            assert_eq!(language(l.code), Some(l));
        }
    }
}
