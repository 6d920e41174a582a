//! The NIST mteval tokenization rules (a published standard; rules from memory, checked in the
//! test suite against `nltk.tokenize.nist.NISTTokenizer` of NLTK 3.10.4).
//!
//! Each rule is one left-to-right, non-overlapping substitution over the output of the previous
//! rule, exactly as the reference implementation applies its regular expressions one after
//! another; the order of the rules therefore matters and is kept.
//!
//! Western rules (`nist`):
//! 1. remove `<skipped>`; unescape `&lt; &gt; &apos; &quot; &#124; &#91; &#93; &amp;`
//!    (in this order, `&amp;` last); U+2028 becomes a space;
//! 2. pad with a space on each side, lowercase when asked;
//! 3. surround every ASCII punctuation and symbol character except `' , - .` with spaces;
//! 4. split a period or comma from a preceding non-digit; then from a following non-digit;
//! 5. split a dash that follows a digit;
//! 6. split on white space.
//!
//! International rules (`nist-unicode`):
//! 1. remove `<skipped>`; U+2028 becomes a space; unescape as above; lowercase when asked;
//! 2. put spaces around every run of ASCII characters (so ASCII and non-ASCII text separate);
//! 3. split punctuation (Unicode P*) from a preceding number (N*); then from a following number;
//! 4. surround every symbol (Unicode S*) with spaces;
//! 5. split on white space.

use unicode_general_category::{get_general_category, GeneralCategory as G};

use super::push_lowercased;

/// Entities unescaped by both rule sets, in the order they are replaced (`&amp;` last, so that
/// `&amp;lt;` becomes `&lt;` and not `<`).
const ENTITIES: [(&str, &str); 8] = [
    ("&lt;", "<"),
    ("&gt;", ">"),
    ("&apos;", "'"),
    ("&quot;", "\""),
    ("&#124;", "|"),
    ("&#91;", "["),
    ("&#93;", "]"),
    ("&amp;", "&"),
];

/// Marker removed from the text before tokenization.
const SKIPPED_MARK: &str = "<skipped>";
/// Line separator replaced by a space.
const LINE_SEPARATOR: &str = "\u{2028}";

/// Tokenize with the western rules; the space-separated result is written to `out`.
pub fn nist_western(text: &str, lowercase: bool, out: &mut String, tmp: &mut String) {
    tmp.clear();
    tmp.push_str(text);
    replace_all(tmp, out, SKIPPED_MARK, "");
    for (entity, plain) in ENTITIES {
        replace_all(tmp, out, entity, plain);
    }
    replace_all(tmp, out, LINE_SEPARATOR, " ");

    out.clear();
    out.push(' ');
    push_lowercased(tmp, lowercase, out);
    out.push(' ');

    tmp.clear();
    pad_ascii(out, tmp, is_western_punct);
    std::mem::swap(out, tmp);
    let b = out.as_bytes();
    if b.contains(&b'.') || b.contains(&b',') {
        tmp.clear();
        pair_then_space(out, tmp, |x| !x.is_ascii_digit(), is_period_or_comma);
        out.clear();
        space_then_pair(tmp, out, is_period_or_comma, |x| !x.is_ascii_digit());
    }
    if out.as_bytes().contains(&b'-') {
        tmp.clear();
        pair_then_space(out, tmp, |x| x.is_ascii_digit(), |x| x == b'-');
        std::mem::swap(out, tmp);
    }
}

/// Tokenize with the international rules; the space-separated result is written to `out`.
pub fn nist_international(text: &str, lowercase: bool, out: &mut String, tmp: &mut String) {
    tmp.clear();
    tmp.push_str(text);
    replace_all(tmp, out, SKIPPED_MARK, "");
    replace_all(tmp, out, LINE_SEPARATOR, " ");
    for (entity, plain) in ENTITIES {
        replace_all(tmp, out, entity, plain);
    }
    out.clear();
    push_lowercased(tmp, lowercase, out);

    tmp.clear();
    pad_ascii_runs(out, tmp);
    out.clear();
    char_pair_then_space(tmp, out, is_number, is_punctuation);
    tmp.clear();
    char_space_then_pair(out, tmp, is_punctuation, is_number);
    out.clear();
    for c in tmp.chars() {
        if is_symbol(c) {
            out.push(' ');
            out.push(c);
            out.push(' ');
        } else {
            out.push(c);
        }
    }
}

/// ASCII punctuation and symbols split by the western rules: `{|}~ [\]^_` ``  !"#$%& ()*+
/// :;<=>?@ /` (and the space itself, harmlessly). Not `' , - .` and not digits or letters.
#[inline]
fn is_western_punct(b: u8) -> bool {
    matches!(b, b'{'..=b'~' | b'['..=b'`' | b' '..=b'&' | b'('..=b'+' | b':'..=b'@' | b'/')
}

#[inline]
fn is_period_or_comma(b: u8) -> bool {
    b == b'.' || b == b','
}

/// Unicode number (N*: Nd, Nl, No).
pub fn is_number(c: char) -> bool {
    matches!(get_general_category(c), G::DecimalNumber | G::LetterNumber | G::OtherNumber)
}

/// Unicode punctuation (P*).
pub fn is_punctuation(c: char) -> bool {
    matches!(
        get_general_category(c),
        G::ConnectorPunctuation
            | G::DashPunctuation
            | G::OpenPunctuation
            | G::ClosePunctuation
            | G::InitialPunctuation
            | G::FinalPunctuation
            | G::OtherPunctuation
    )
}

/// Unicode symbol (S*).
pub fn is_symbol(c: char) -> bool {
    matches!(
        get_general_category(c),
        G::MathSymbol | G::CurrencySymbol | G::ModifierSymbol | G::OtherSymbol
    )
}

/// Replace every non-overlapping occurrence of `pat` in `text` (left to right), using `tmp` as
/// scratch space.
fn replace_all(text: &mut String, tmp: &mut String, pat: &str, with: &str) {
    if !text.contains(pat) {
        return;
    }
    tmp.clear();
    let mut rest = text.as_str();
    while let Some(at) = rest.find(pat) {
        tmp.push_str(&rest[..at]);
        tmp.push_str(with);
        rest = &rest[at + pat.len()..];
    }
    tmp.push_str(rest);
    std::mem::swap(text, tmp);
}

/// Surround every ASCII byte for which `pred` holds with spaces.
fn pad_ascii(src: &str, dst: &mut String, pred: impl Fn(u8) -> bool) {
    let b = src.as_bytes();
    let mut copied = 0;
    for (i, &x) in b.iter().enumerate() {
        if pred(x) {
            dst.push_str(&src[copied..i]);
            dst.push(' ');
            dst.push(x as char);
            dst.push(' ');
            copied = i + 1;
        }
    }
    dst.push_str(&src[copied..]);
}

/// The substitution `(A)(B)` -> `A B ` where B is an ASCII byte class and A any byte class:
/// scanning bytes is exact here because B never matches inside a multi-byte character, and a
/// multi-byte character can only end right before an ASCII byte at its last byte.
fn pair_then_space(src: &str, dst: &mut String, a: impl Fn(u8) -> bool, b_ascii: impl Fn(u8) -> bool) {
    let b = src.as_bytes();
    let mut copied = 0;
    let mut i = 0;
    while i + 1 < b.len() {
        if b_ascii(b[i + 1]) && a(b[i]) {
            dst.push_str(&src[copied..i + 1]);
            dst.push(' ');
            dst.push(b[i + 1] as char);
            dst.push(' ');
            i += 2;
            copied = i;
        } else {
            i += 1;
        }
    }
    dst.push_str(&src[copied..]);
}

/// The substitution `(A)(B)` -> ` A B` where A is an ASCII byte class and B any byte class (B is
/// consumed, so it cannot start the next match, but it is copied unchanged).
fn space_then_pair(src: &str, dst: &mut String, a_ascii: impl Fn(u8) -> bool, b: impl Fn(u8) -> bool) {
    let bytes = src.as_bytes();
    let mut copied = 0;
    let mut i = 0;
    while i + 1 < bytes.len() {
        if a_ascii(bytes[i]) && b(bytes[i + 1]) {
            dst.push_str(&src[copied..i]);
            dst.push(' ');
            dst.push(bytes[i] as char);
            dst.push(' ');
            copied = i + 1;
            i += 2;
        } else {
            i += 1;
        }
    }
    dst.push_str(&src[copied..]);
}

/// Put a space before and after every maximal run of ASCII characters.
fn pad_ascii_runs(src: &str, dst: &mut String) {
    let mut in_run = false;
    for c in src.chars() {
        let ascii = c.is_ascii();
        if ascii && !in_run {
            dst.push(' ');
        } else if !ascii && in_run {
            dst.push(' ');
        }
        in_run = ascii;
        dst.push(c);
    }
    if in_run {
        dst.push(' ');
    }
}

/// `(A)(B)` -> `A B ` over characters.
fn char_pair_then_space(src: &str, dst: &mut String, a: impl Fn(char) -> bool, b: impl Fn(char) -> bool) {
    let mut it = src.chars().peekable();
    while let Some(c) = it.next() {
        match it.peek() {
            Some(&d) if a(c) && b(d) => {
                dst.push(c);
                dst.push(' ');
                dst.push(d);
                dst.push(' ');
                it.next();
            }
            _ => dst.push(c),
        }
    }
}

/// `(A)(B)` -> ` A B` over characters.
fn char_space_then_pair(src: &str, dst: &mut String, a: impl Fn(char) -> bool, b: impl Fn(char) -> bool) {
    let mut it = src.chars().peekable();
    while let Some(c) = it.next() {
        match it.peek() {
            Some(&d) if a(c) && b(d) => {
                dst.push(' ');
                dst.push(c);
                dst.push(' ');
                dst.push(d);
                it.next();
            }
            _ => dst.push(c),
        }
    }
}

#[cfg(test)]
mod tests {
    use crate::text::Tokenizer;

    fn west(s: &str) -> Vec<String> {
        Tokenizer::Nist.tokenize(s, false)
    }
    fn intl(s: &str) -> Vec<String> {
        Tokenizer::NistUnicode.tokenize(s, false)
    }

    // Expected values below are worked out by hand from the rules in the module documentation.
    #[test]
    fn western_splits_punctuation_but_keeps_numbers() {
        assert_eq!(west("Departure at 14:30, gate 2.5!"), ["Departure", "at", "14", ":", "30", ",", "gate", "2.5", "!"]);
        assert_eq!(west("Tickets: 1,200 sold."), ["Tickets", ":", "1,200", "sold", "."]);
        assert_eq!(west("deck's open"), ["deck's", "open"]);
        assert_eq!(west("10-minute delay - sorry"), ["10", "-", "minute", "delay", "-", "sorry"]);
    }

    #[test]
    fn western_unescapes_entities_in_order() {
        assert_eq!(west("a &amp;lt; b &quot;x&quot;"), ["a", "&", "lt", ";", "b", "\"", "x", "\""]);
        assert_eq!(west("x<skipped>y\u{2028}z"), ["xy", "z"]);
    }

    #[test]
    fn western_non_overlapping_pairs() {
        // "a.." : the first pair "a." is consumed, the second '.' sees '.' before it (consumed),
        // and the follow rule then splits ". ." pairs.
        assert_eq!(west("a..b"), ["a", ".", ".", "b"]);
        assert_eq!(west("3.b"), ["3", ".", "b"]);
        assert_eq!(west("é.ü"), ["é", ".", "ü"]);
    }

    #[test]
    fn international_rules() {
        // Every ASCII run is padded, so a word mixing ASCII and non-ASCII letters splits.
        assert_eq!(intl("Fähre «Nord» kostet 5€."), ["F", "ä", "hre", "«", "Nord", "»", "kostet", "5", "€", "."]);
        assert_eq!(intl("hello, world"), ["hello,", "world"]);
        assert_eq!(intl("1,2"), ["1", ",", "2"]);
    }
}
