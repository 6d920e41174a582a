//! Text normalisation and tokenizers.
//!
//! Every tokenizer turns any valid UTF-8 string into a list of tokens (never panics) and can work
//! inside a reusable [`TokenBuf`], so the scoring hot path does not allocate a `String` per token.
//!
//! | name           | rule |
//! |----------------|------|
//! | `whitespace`   | split on white space only |
//! | `nist`         | the NIST mteval "western" rules (default) |
//! | `nist-unicode` | the NIST "international" rules over Unicode punctuation, symbol and number classes |
//! | `cjk`          | every CJK ideograph, kana and CJK / full-width punctuation mark a token, the rest (Hangul included) as `nist` |
//! | `characters`   | every non-space character a token |
//!
//! White space, everywhere in mtgauge, is the Unicode `White_Space` property plus the ASCII
//! information separators U+001C..U+001F (the characters Python's `str.split()` splits on, which is
//! what the outside reference implementation of the NIST rules uses).

mod nist;

use std::fmt;
use std::str::FromStr;

pub use nist::{nist_international, nist_western};

/// The tokenizer used when none is named.
pub const DEFAULT_TOKENIZER: Tokenizer = Tokenizer::Nist;

/// A tokenizer, selected by name on the command line and in session definitions.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, PartialOrd, Ord, serde::Serialize, serde::Deserialize)]
#[serde(into = "String", try_from = "String")]
pub enum Tokenizer {
    /// Split on white space only.
    Whitespace,
    /// NIST mteval "western" rules.
    Nist,
    /// NIST "international" rules over Unicode classes.
    NistUnicode,
    /// CJK ideographs, kana and CJK punctuation one token each, the rest (Hangul included) as
    /// `nist`.
    Cjk,
    /// Every non-space character a token.
    Characters,
}

impl Tokenizer {
    /// All tokenizers, in the order `--help` lists them.
    pub const ALL: [Tokenizer; 5] = [
        Tokenizer::Whitespace,
        Tokenizer::Nist,
        Tokenizer::NistUnicode,
        Tokenizer::Cjk,
        Tokenizer::Characters,
    ];

    /// The name used on the command line, in JSON output and in session definitions.
    pub fn name(self) -> &'static str {
        match self {
            Tokenizer::Whitespace => "whitespace",
            Tokenizer::Nist => "nist",
            Tokenizer::NistUnicode => "nist-unicode",
            Tokenizer::Cjk => "cjk",
            Tokenizer::Characters => "characters",
        }
    }

    /// Tokenize `text` into `buf` (its previous content is replaced). Read the tokens with
    /// [`TokenBuf::tokens`].
    pub fn tokenize_into(self, text: &str, lowercase: bool, buf: &mut TokenBuf) {
        buf.spans.clear();
        match self {
            Tokenizer::Whitespace => {
                buf.text.clear();
                push_lowercased(text, lowercase, &mut buf.text);
                buf.split_on_space();
            }
            Tokenizer::Nist => {
                nist_western(text, lowercase, &mut buf.text, &mut buf.scratch);
                buf.split_on_space();
            }
            Tokenizer::NistUnicode => {
                nist_international(text, lowercase, &mut buf.text, &mut buf.scratch);
                buf.split_on_space();
            }
            Tokenizer::Cjk => {
                let mut spaced = std::mem::take(&mut buf.cjk);
                spaced.clear();
                pad_chars(text, is_cjk, &mut spaced);
                nist_western(&spaced, lowercase, &mut buf.text, &mut buf.scratch);
                buf.cjk = spaced;
                buf.split_on_space();
            }
            Tokenizer::Characters => {
                buf.text.clear();
                push_lowercased(text, lowercase, &mut buf.text);
                for (i, c) in buf.text.char_indices() {
                    if !is_space(c) {
                        buf.spans.push((i as u32, (i + c.len_utf8()) as u32));
                    }
                }
            }
        }
    }

    /// Tokenize into owned strings (convenient for tests and the `tokenize` command; the scoring
    /// path uses [`Tokenizer::tokenize_into`]).
    pub fn tokenize(self, text: &str, lowercase: bool) -> Vec<String> {
        let mut buf = TokenBuf::default();
        self.tokenize_into(text, lowercase, &mut buf);
        buf.tokens().map(str::to_owned).collect()
    }
}

impl fmt::Display for Tokenizer {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(self.name())
    }
}

/// An unknown tokenizer name.
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
#[error("unknown tokenizer '{0}' (choose one of: whitespace, nist, nist-unicode, cjk, characters)")]
pub struct UnknownTokenizer(pub String);

impl FromStr for Tokenizer {
    type Err = UnknownTokenizer;
    fn from_str(s: &str) -> Result<Self, Self::Err> {
        Tokenizer::ALL
            .into_iter()
            .find(|t| t.name() == s)
            .ok_or_else(|| UnknownTokenizer(s.to_owned()))
    }
}

impl From<Tokenizer> for String {
    fn from(t: Tokenizer) -> String {
        t.name().to_owned()
    }
}

impl TryFrom<String> for Tokenizer {
    type Error = UnknownTokenizer;
    fn try_from(s: String) -> Result<Self, Self::Error> {
        s.parse()
    }
}

/// Reusable buffers for tokenization: the normalised text and the byte spans of its tokens.
#[derive(Debug, Default, Clone)]
pub struct TokenBuf {
    text: String,
    scratch: String,
    cjk: String,
    spans: Vec<(u32, u32)>,
}

impl TokenBuf {
    /// The tokens of the last [`Tokenizer::tokenize_into`] call.
    pub fn tokens(&self) -> impl ExactSizeIterator<Item = &str> + '_ {
        self.spans.iter().map(move |&(a, b)| &self.text[a as usize..b as usize])
    }

    /// The tokens of the last call as byte strings (what the interner keys on).
    pub fn token_bytes(&self) -> impl ExactSizeIterator<Item = &[u8]> + '_ {
        let bytes = self.text.as_bytes();
        self.spans.iter().map(move |&(a, b)| &bytes[a as usize..b as usize])
    }

    /// Number of tokens of the last call.
    pub fn len(&self) -> usize {
        self.spans.len()
    }

    /// True when the last call produced no token.
    pub fn is_empty(&self) -> bool {
        self.spans.is_empty()
    }

    /// The normalised text of the last call, as bytes (what [`TokenBuf::spans`] index).
    pub fn text_bytes(&self) -> &[u8] {
        self.text.as_bytes()
    }

    /// Byte spans `(start, end)` of the tokens of the last call in [`TokenBuf::text_bytes`].
    pub fn spans(&self) -> &[(u32, u32)] {
        &self.spans
    }

    fn split_on_space(&mut self) {
        let spans = &mut self.spans;
        for_each_space_token(&self.text, |a, b| spans.push((a as u32, b as u32)));
    }
}

/// Call `f(start, end)` with the byte span of every white-space separated token of `text`, in
/// order: the `whitespace` tokenizer without a copy of the text.
#[inline]
pub fn for_each_space_token(text: &str, mut f: impl FnMut(usize, usize)) {
    let bytes = text.as_bytes();
    let mut i = 0;
    loop {
        // Skip white space.
        loop {
            let Some(&b) = bytes.get(i) else { return };
            if b < 0x80 {
                if !ASCII_SPACE[b as usize] {
                    break;
                }
                i += 1;
            } else {
                let c = text[i..].chars().next().unwrap_or(' ');
                if !c.is_whitespace() {
                    break;
                }
                i += c.len_utf8();
            }
        }
        // A token: up to the next white space or the end.
        let start = i;
        i += 1;
        let space_width = loop {
            // Eight bytes at a time while they are printable ASCII (not white space).
            while let Some(w) = bytes.get(i..i + 8) {
                let w = u64::from_le_bytes(w.try_into().unwrap_or([0; 8]));
                // High bit of each byte below 0x21 or from 0x80 up; exact for the lowest such
                // byte (a borrow only comes from a lower byte, itself flagged).
                let special = (w.wrapping_sub(0x2121_2121_2121_2121) | w) & 0x8080_8080_8080_8080;
                if special == 0 {
                    i += 8;
                } else {
                    i += special.trailing_zeros() as usize / 8;
                    break;
                }
            }
            let Some(&b) = bytes.get(i) else {
                // The end: one call site for `f`, so that it is inlined.
                break 0;
            };
            if b < 0x80 {
                if ASCII_SPACE[b as usize] {
                    break 1;
                }
                i += 1;
            } else if b < 0xC0 {
                // A continuation byte: inside a character already judged not to be space.
                i += 1;
            } else {
                let c = text[i..].chars().next().unwrap_or(' ');
                if c.is_whitespace() {
                    break c.len_utf8();
                }
                i += c.len_utf8();
            }
        };
        f(start, i);
        if space_width == 0 {
            return;
        }
        i += space_width;
    }
}

/// [`is_space`] for the ASCII range, as a table.
pub(crate) const ASCII_SPACE: [bool; 128] = {
    let mut t = [false; 128];
    let mut b = 0;
    while b < 128 {
        t[b] = matches!(b as u8, b' ' | b'\t' | b'\n' | 0x0B | 0x0C | b'\r' | 0x1C..=0x1F);
        b += 1;
    }
    t
};

/// White space as mtgauge understands it: Unicode `White_Space` plus U+001C..U+001F.
#[inline]
pub fn is_space(c: char) -> bool {
    if c.is_ascii() {
        matches!(c, ' ' | '\t' | '\n' | '\u{0B}' | '\u{0C}' | '\r' | '\u{1C}'..='\u{1F}')
    } else {
        c.is_whitespace()
    }
}

/// Append `text` to `out`, lowercased (Unicode full case mapping) when `lowercase` is set.
pub fn push_lowercased(text: &str, lowercase: bool, out: &mut String) {
    if !lowercase {
        out.push_str(text);
    } else if text.is_ascii() {
        let start = out.len();
        out.push_str(text);
        out[start..].make_ascii_lowercase();
    } else {
        out.push_str(&text.to_lowercase());
    }
}

/// Lowercase `text` when asked, borrowing it unchanged otherwise.
pub fn lowercased(text: &str, lowercase: bool) -> std::borrow::Cow<'_, str> {
    if lowercase && text.chars().any(|c| c.is_uppercase() || !c.is_ascii()) {
        std::borrow::Cow::Owned(text.to_lowercase())
    } else {
        std::borrow::Cow::Borrowed(text)
    }
}

/// Copy `text` into `out`, surrounding every character for which `pred` holds with spaces.
fn pad_chars(text: &str, pred: impl Fn(char) -> bool, out: &mut String) {
    for c in text.chars() {
        if pred(c) {
            out.push(' ');
            out.push(c);
            out.push(' ');
        } else {
            out.push(c);
        }
    }
}

/// CJK ideographs (unified, extensions and compatibility), kana (hiragana, katakana, half-width
/// katakana) and CJK / full-width punctuation: the characters the `cjk` tokenizer makes tokens
/// of their own.
///
/// Chinese and Japanese are written without spaces between words; without a morphological
/// analyser, one token per ideograph or kana is common practice for scoring them. Korean is
/// written with spaces between words, so Hangul (syllables U+AC00..U+D7A3, jamo U+1100..U+11FF,
/// compatibility jamo U+3130..U+318F, half-width jamo U+FFA0..U+FFDC, extended jamo, and the
/// Hangul tone marks U+302E..U+302F) is not listed here and stays inside its words.
pub fn is_cjk(c: char) -> bool {
    matches!(c as u32,
        0x3000..=0x302D     // CJK symbols and punctuation (up to the ideographic tone marks)
        | 0x3030..=0x303F   // (U+302E..U+302F are the Hangul tone marks)
        | 0x3040..=0x30FF   // hiragana, katakana
        | 0x31F0..=0x31FF   // katakana phonetic extensions
        | 0x3400..=0x4DBF   // CJK extension A
        | 0x4E00..=0x9FFF   // CJK unified ideographs
        | 0xF900..=0xFAFF   // CJK compatibility ideographs
        | 0xFF01..=0xFF0F   // full-width punctuation
        | 0xFF1A..=0xFF20
        | 0xFF3B..=0xFF40
        | 0xFF5B..=0xFF65   // (including the half-width CJK punctuation U+FF61..U+FF65)
        | 0xFF66..=0xFF9F   // half-width katakana
        | 0x20000..=0x3134F // CJK extensions B..G
    )
}

#[cfg(test)]
mod tests {
    use super::*;
    use proptest::prelude::*;

    #[test]
    fn names_round_trip() {
        for t in Tokenizer::ALL {
            assert_eq!(t.name().parse::<Tokenizer>().unwrap(), t);
        }
        assert!("moses".parse::<Tokenizer>().is_err());
    }

    #[test]
    fn whitespace_splits_on_unicode_space() {
        let toks = Tokenizer::Whitespace.tokenize("a\u{3000}b\u{A0}c \t d\u{1F}e", false);
        assert_eq!(toks, ["a", "b", "c", "d", "e"]);
    }

    #[test]
    fn characters_skips_space_and_lowercases() {
        assert_eq!(Tokenizer::Characters.tokenize("Ab c", true), ["a", "b", "c"]);
    }

    #[test]
    fn cjk_splits_ideographs_and_keeps_latin_words() {
        let toks = Tokenizer::Cjk.tokenize("渡轮14:30出发, ferry late.", false);
        assert_eq!(toks, ["渡", "轮", "14", ":", "30", "出", "发", ",", "ferry", "late", "."]);
    }

    // Expected values worked out by hand from the `cjk` rule (is_cjk, then the `nist` rules).
    #[test]
    fn cjk_keeps_korean_words_whole() {
        // Korean separates words with spaces: Hangul syllables are not split; the western rules
        // still split the final period (preceded by a non-digit) from the word.
        let toks = Tokenizer::Cjk.tokenize("배가 9시에 출발합니다.", false);
        assert_eq!(toks, ["배가", "9시에", "출발합니다", "."]);
        // Conjoining jamo (U+1100 U+1161 = 가 decomposed), compatibility jamo and half-width
        // jamo stay inside their words too.
        let toks = Tokenizer::Cjk.tokenize("\u{1100}\u{1161}방 ㅋㅋ ﾡﾢ", false);
        assert_eq!(toks, ["\u{1100}\u{1161}방", "ㅋㅋ", "ﾡﾢ"]);
        assert!(!"가힣ㄱㆎ\u{1100}\u{11FF}\u{302E}\u{FFA0}".chars().any(is_cjk));
    }

    #[test]
    fn cjk_splits_kana_and_cjk_punctuation() {
        // Hiragana, katakana, half-width katakana, ideographs and CJK punctuation: one each.
        let toks = Tokenizer::Cjk.tokenize("フェリーは9時に出ます。ｶﾀ「港」", false);
        assert_eq!(
            toks,
            ["フ", "ェ", "リ", "ー", "は", "9", "時", "に", "出", "ま", "す", "。", "ｶ", "ﾀ", "「", "港", "」"]
        );
    }

    #[test]
    fn cjk_mixed_latin_ideographs_and_hangul() {
        let toks = Tokenizer::Cjk.tokenize("Ferry渡轮 부두Pier, 北港.", false);
        assert_eq!(toks, ["Ferry", "渡", "轮", "부두Pier", ",", "北", "港", "."]);
    }

    #[test]
    fn lowercase_is_unicode_aware() {
        assert_eq!(Tokenizer::Whitespace.tokenize("ÄRGER ΟΔΟΣ", true), ["ärger", "οδος"]);
    }

    proptest! {
        #[test]
        fn no_tokenizer_panics_and_tokens_are_clean(s in "\\PC*", lower in any::<bool>()) {
            for t in Tokenizer::ALL {
                for tok in t.tokenize(&s, lower) {
                    prop_assert!(!tok.is_empty());
                    prop_assert!(!tok.chars().any(is_space));
                }
            }
        }

        #[test]
        fn whitespace_tokens_rejoin_to_the_text(words in proptest::collection::vec("[a-zA-Z0-9.,;]{1,8}", 0..20)) {
            let text = words.join("  ");
            prop_assert_eq!(Tokenizer::Whitespace.tokenize(&text, false), words);
        }

        #[test]
        fn span_scan_equals_splitting_on_space(s in "(\\PC|[ \t\u{85}\u{A0}\u{1680}\u{2000}-\u{200A}\u{2028}\u{2029}\u{202F}\u{205F}\u{3000}\u{1C}-\u{1F}])*") {
            let mut spans = Vec::new();
            for_each_space_token(&s, |a, b| spans.push(&s[a..b]));
            let want: Vec<&str> = s.split(is_space).filter(|w| !w.is_empty()).collect();
            prop_assert_eq!(spans, want);
        }

        #[test]
        fn reusing_a_buffer_gives_the_same_tokens(a in "\\PC*", b in "\\PC*") {
            let mut buf = TokenBuf::default();
            for t in Tokenizer::ALL {
                t.tokenize_into(&a, false, &mut buf);
                t.tokenize_into(&b, true, &mut buf);
                let reused: Vec<String> = buf.tokens().map(str::to_owned).collect();
                prop_assert_eq!(reused, t.tokenize(&b, true));
            }
        }
    }
}
