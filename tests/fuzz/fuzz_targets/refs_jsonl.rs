//! JSONL references: `parse_jsonl`, `RefSet::new` (duplicate ids) and the encode / decode round
//! trip, on raw bytes and on files written from structured fuzz data.

#![no_main]

use std::collections::HashMap;

use libfuzzer_sys::arbitrary::Unstructured;
use libfuzzer_sys::fuzz_target;
use mtgauge::refs::{parse_jsonl, split_lines, RefSet, RefSetError, SegmentInput};

const FILE: &str = "refs.jsonl";

fn round_trip(set: &RefSet) {
    let bytes = set.encode();
    let back = RefSet::decode(&bytes, Some(&set.digest())).unwrap_or_else(|e| panic!("decode(encode(set)) failed: {e}"));
    assert_eq!(back.digest(), set.digest(), "decoded digest");
    assert_eq!(back.encode(), bytes);
    for (a, b) in set.segments().zip(back.segments()) {
        assert_eq!((a.id(), a.source()), (b.id(), b.source()));
        assert!(a.refs().eq(b.refs()));
    }
}

/// What `RefSet::new` must say of parsed segments: the first repeated id, with the 1-based
/// positions (= line numbers in a JSONL file) of its first and second occurrence.
fn first_duplicate(segs: &[SegmentInput]) -> Option<(String, usize, usize)> {
    let mut seen: HashMap<&str, usize> = HashMap::new();
    for (i, s) in segs.iter().enumerate() {
        if let Some(&first) = seen.get(s.id.as_str()) {
            return Some((s.id.clone(), first + 1, i + 1));
        }
        seen.insert(&s.id, i);
    }
    None
}

/// Build the set and check the outcome against [`first_duplicate`].
fn build(segs: Vec<SegmentInput>) -> Option<RefSet> {
    let dup = first_duplicate(&segs);
    match (RefSet::new(segs), dup) {
        (Ok(set), None) => Some(set),
        (Err(RefSetError::DuplicateId { id, first, second }), Some(want)) => {
            assert_eq!((id, first, second), want, "duplicate id reported at the wrong lines");
            None
        }
        (got, want) => panic!("RefSet::new gave {got:?}, expected duplicate {want:?}"),
    }
}

fn raw(data: &[u8]) {
    let lines = split_lines(FILE, data).map(|l| l.len());
    match parse_jsonl(FILE, data) {
        Ok(segs) => {
            assert_eq!(Ok(segs.len()), lines.as_ref().map(|n| *n).map_err(|_| ()), "one segment per line");
            for s in &segs {
                assert!(!s.id.is_empty() && !s.refs.is_empty(), "parse_jsonl let through {s:?}");
            }
            if let Some(set) = build(segs) {
                round_trip(&set);
            }
        }
        Err(e) => {
            assert_eq!(e.file, FILE);
            let line = e.line.unwrap_or_else(|| panic!("a JSONL error names its line: {e}"));
            assert!(line >= 1, "{e}");
            if let Ok(n) = lines {
                assert!(line <= n, "error at line {line} of a {n}-line file: {e}");
            }
            assert!(e.to_string().starts_with(&format!("{FILE}:{line}: ")), "{e}");
        }
    }
}

/// A string of at most 24 characters, often from a small palette (so that ids repeat).
fn text(u: &mut Unstructured<'_>) -> String {
    const PALETTE: [&str; 8] = ["a", "7", " ", "\"", "\\", "ü", "\u{2028}", "\r"];
    let n = u.int_in_range(0..=24usize).unwrap_or(0);
    let mut s = String::new();
    for _ in 0..n {
        if u.ratio(3u8, 4u8).unwrap_or(true) {
            s.push_str(u.choose(&PALETTE).copied().unwrap_or("a"));
        } else {
            s.push(u.arbitrary().unwrap_or('x'));
        }
    }
    s
}

fn structured(u: &mut Unstructured<'_>) {
    let n = u.int_in_range(0..=6usize).unwrap_or(0);
    let crlf: bool = u.arbitrary().unwrap_or(false);
    let mut body = String::new();
    let mut want: Vec<SegmentInput> = Vec::new();
    let mut bad_line = None;
    for i in 0..n {
        let numeric: bool = u.arbitrary().unwrap_or(false);
        let (id_json, id) = if numeric {
            let v = u.int_in_range(0..=20u64).unwrap_or(0);
            (serde_json::json!(v), v.to_string())
        } else {
            let s = text(u);
            (serde_json::json!(s), s)
        };
        let source = if u.arbitrary().unwrap_or(false) { Some(text(u)) } else { None };
        let refs: Vec<String> = (0..u.int_in_range(0..=3usize).unwrap_or(1)).map(|_| text(u)).collect();
        let mut obj = serde_json::Map::new();
        obj.insert("id".into(), id_json);
        match (&source, u.arbitrary().unwrap_or(false)) {
            (Some(s), _) => {
                obj.insert("source".into(), serde_json::json!(s));
            }
            (None, true) => {
                obj.insert("source".into(), serde_json::Value::Null);
            }
            (None, false) => {}
        }
        obj.insert("refs".into(), serde_json::json!(refs));
        if u.arbitrary().unwrap_or(false) {
            obj.insert("note".into(), serde_json::json!({"ignored": [1, 2]}));
        }
        body.push_str(&serde_json::Value::Object(obj).to_string());
        body.push_str(if crlf { "\r\n" } else { "\n" });
        if bad_line.is_none() && (id.is_empty() || refs.is_empty()) {
            bad_line = Some(i + 1);
        }
        want.push(SegmentInput { id, source, refs });
    }
    match (parse_jsonl(FILE, body.as_bytes()), bad_line) {
        (Ok(got), None) => {
            assert_eq!(got, want, "parse_jsonl did not give back what was written");
            if let Some(set) = build(got) {
                round_trip(&set);
            }
        }
        (Err(e), Some(line)) => assert_eq!(e.line, Some(line), "{e}"),
        (got, want) => panic!("parse_jsonl gave {got:?}; expected an error at line {want:?}"),
    }
    // An empty line anywhere is an error naming that line.
    if n > 0 {
        let at = u.int_in_range(0..=n).unwrap_or(0);
        let mut lines: Vec<&str> = body.lines().collect();
        lines.insert(at, "");
        let with_gap = lines.join("\n") + "\n";
        let e = parse_jsonl(FILE, with_gap.as_bytes()).expect_err("an empty line was accepted");
        if bad_line.is_none_or(|b| b > at) {
            assert_eq!(e.line, Some(at + 1), "{e}");
            assert!(e.message.contains("empty line"), "{e}");
        }
    }
}

fuzz_target!(|data: &[u8]| {
    if let Ok(set) = RefSet::decode(data, None) {
        assert_eq!(set.encode(), data, "decode accepted a non-canonical encoding");
    }
    raw(data);
    structured(&mut Unstructured::new(data));
});
