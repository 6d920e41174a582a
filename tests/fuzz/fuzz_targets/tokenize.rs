//! Every tokenizer, lowercasing off and on, over arbitrary text: no panic, and the tokens are
//! well formed (non-empty, free of white space, the same through a reused buffer).

#![no_main]

use libfuzzer_sys::fuzz_target;
use mtgauge::text::{for_each_space_token, is_space, TokenBuf, Tokenizer};

/// The fuzz bytes as text: as they are when valid UTF-8, else with invalid sequences replaced.
fn text(data: &[u8]) -> std::borrow::Cow<'_, str> {
    String::from_utf8_lossy(data)
}

fuzz_target!(|data: &[u8]| {
    let text = text(data);
    let text = text.as_ref();
    // One buffer reused across every call: earlier contents must never leak into a result.
    let mut buf = TokenBuf::default();
    for t in Tokenizer::ALL {
        for lowercase in [false, true] {
            let owned = t.tokenize(text, lowercase);
            t.tokenize_into(text, lowercase, &mut buf);
            assert_eq!(buf.len(), owned.len(), "{t} lowercase={lowercase}: reused buffer");
            assert!(buf.tokens().eq(owned.iter().map(String::as_str)), "{t} lowercase={lowercase}: reused buffer");
            assert_eq!(buf.is_empty(), owned.is_empty());
            // Spans: in bounds, on character boundaries, in order, not overlapping.
            let norm = buf.text_bytes();
            let mut last_end = 0usize;
            for (&(a, e), tok) in buf.spans().iter().zip(buf.token_bytes()) {
                let (a, e) = (a as usize, e as usize);
                assert!(last_end <= a && a < e && e <= norm.len(), "{t}: span {a}..{e} after {last_end} in {} bytes", norm.len());
                assert_eq!(&norm[a..e], tok);
                assert!(std::str::from_utf8(tok).is_ok(), "{t}: span not on character boundaries");
                last_end = e;
            }
            for tok in &owned {
                assert!(!tok.is_empty(), "{t}: empty token");
                assert!(!tok.chars().any(is_space), "{t}: token {tok:?} holds white space");
            }
            match t {
                Tokenizer::Characters => {
                    assert!(owned.iter().all(|tok| tok.chars().count() == 1), "characters: a token of several characters");
                    if !lowercase {
                        assert_eq!(owned.len(), text.chars().filter(|&c| !is_space(c)).count());
                    }
                }
                Tokenizer::Whitespace => {
                    let lowered;
                    let source = if lowercase {
                        lowered = text.to_lowercase();
                        lowered.as_str()
                    } else {
                        text
                    };
                    let want: Vec<&str> = source.split(is_space).filter(|w| !w.is_empty()).collect();
                    assert_eq!(owned, want, "whitespace lowercase={lowercase}: not a split on white space");
                    // Splitting is idempotent: the joined tokens split into the same tokens.
                    assert_eq!(Tokenizer::Whitespace.tokenize(&owned.join(" "), false), owned);
                }
                _ => {}
            }
        }
    }
    // The span scanner alone (the scoring fast path for `whitespace` without lowercasing).
    let mut spans = Vec::new();
    for_each_space_token(text, |a, e| spans.push(&text[a..e]));
    assert!(spans.iter().copied().eq(text.split(is_space).filter(|w| !w.is_empty())), "for_each_space_token");
});
