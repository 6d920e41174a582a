//! Line-aligned plain references: `split_lines`, `parse_plain`, `RefSet::new` and the
//! `RefSet::encode` / `RefSet::decode` round trip, on raw bytes and on files made from
//! structured fuzz data (whose expected parse is known).

#![no_main]

use libfuzzer_sys::arbitrary::Unstructured;
use libfuzzer_sys::fuzz_target;
use mtgauge::refs::{parse_plain, split_lines, RefSet};

/// decode(encode(set)) is the set: same digest, same bytes, same fields; a damaged encoding is
/// refused when the digest is checked.
fn round_trip(set: &RefSet, flip: Option<(usize, u8)>) {
    let bytes = set.encode();
    let back = RefSet::decode(&bytes, Some(&set.digest())).unwrap_or_else(|e| panic!("decode(encode(set)) failed: {e}"));
    assert_eq!(back.digest(), set.digest(), "decoded digest");
    assert_eq!(back.encode(), bytes, "re-encoding");
    assert_eq!((back.len(), back.reference_count()), (set.len(), set.reference_count()));
    for (a, b) in set.segments().zip(back.segments()) {
        assert_eq!((a.id(), a.source()), (b.id(), b.source()));
        assert!(a.refs().eq(b.refs()));
        assert_eq!(back.find(a.id()), Some(a.index()));
    }
    if let Some((at, bit)) = flip {
        let mut bad = bytes.clone();
        let at = at % bad.len();
        bad[at] ^= 1 << (bit % 8);
        assert!(RefSet::decode(&bad, Some(&set.digest())).is_err(), "a damaged encoding was accepted (byte {at})");
    }
}

/// What `split_lines` must give for arbitrary bytes (`None`: some line is not UTF-8).
fn lines_by_hand(bytes: &[u8]) -> Option<Vec<String>> {
    let bytes = bytes.strip_prefix(b"\xEF\xBB\xBF").unwrap_or(bytes);
    if bytes.is_empty() {
        return Some(Vec::new());
    }
    let body = bytes.strip_suffix(b"\n").unwrap_or(bytes);
    body.split(|&b| b == b'\n').map(|l| std::str::from_utf8(l.strip_suffix(b"\r").unwrap_or(l)).ok().map(str::to_owned)).collect()
}

/// A line of text without line breaks, from fuzz data.
fn line(u: &mut Unstructured<'_>) -> String {
    let s: String = u.arbitrary().unwrap_or_default();
    s.chars().filter(|&c| c != '\u{FEFF}').map(|c| if c == '\n' || c == '\r' { ' ' } else { c }).take(64).collect()
}

/// A file of `lines`, in one of the accepted spellings (BOM, CRLF, missing final newline).
fn file_of(lines: &[String], bom: bool, crlf: bool, final_newline: bool) -> Vec<u8> {
    let mut out = Vec::new();
    if bom {
        out.extend_from_slice(b"\xEF\xBB\xBF");
    }
    for (i, l) in lines.iter().enumerate() {
        out.extend_from_slice(l.as_bytes());
        let last = i + 1 == lines.len();
        // Without its final newline, a file whose last line is empty would lose that line.
        if !last || final_newline || l.is_empty() {
            out.extend_from_slice(if crlf { b"\r\n" } else { b"\n" });
        }
    }
    out
}

fn raw(u: &mut Unstructured<'_>) {
    let n = u.int_in_range(1..=3usize).unwrap_or(1);
    let with_source: bool = u.arbitrary().unwrap_or(false);
    let mut files: Vec<&[u8]> = Vec::new();
    for _ in 0..n + usize::from(with_source) {
        files.push(u.arbitrary().unwrap_or_default());
    }
    const NAMES: [&str; 4] = ["ref1.txt", "ref2.txt", "ref3.txt", "source.txt"];
    for (k, f) in files.iter().enumerate() {
        match (split_lines(NAMES[k], f), lines_by_hand(f)) {
            (Ok(got), Some(want)) => assert_eq!(got, want, "split_lines"),
            (Err(e), None) => {
                assert_eq!(e.file, NAMES[k]);
                let line = e.line.expect("an invalid-UTF-8 error names its line");
                assert!(line >= 1 && e.to_string().starts_with(&format!("{}:{line}: invalid UTF-8", NAMES[k])), "{e}");
            }
            (got, want) => panic!("split_lines gave {got:?}, by hand {want:?}"),
        }
    }
    let streams: Vec<(&str, &[u8])> = NAMES.iter().copied().zip(files[..n].iter().copied()).collect();
    let source = with_source.then(|| (NAMES[3], files[n]));
    match parse_plain(&streams, source) {
        Ok(segs) => {
            let columns: Vec<Vec<&str>> = files.iter().map(|f| split_lines("f", f).expect("parsed above")).collect();
            assert_eq!(segs.len(), columns[0].len());
            for (i, s) in segs.iter().enumerate() {
                assert_eq!(s.id, (i + 1).to_string(), "plain ids are line numbers");
                assert_eq!(s.refs.len(), n);
                for (r, column) in s.refs.iter().zip(&columns) {
                    assert_eq!(r, column[i]);
                }
                assert_eq!(s.source.as_deref(), with_source.then(|| columns[n][i]));
            }
            let set = RefSet::new(segs).expect("plain segments always make a valid set");
            let flip = (u.arbitrary::<usize>().unwrap_or(0), u.arbitrary::<u8>().unwrap_or(0));
            round_trip(&set, Some(flip));
        }
        Err(e) => {
            assert!(NAMES.contains(&e.file.as_str()), "error names an unknown file: {e}");
            assert!(e.line.is_some_and(|l| l >= 1), "error names no line: {e}");
        }
    }
}

fn structured(u: &mut Unstructured<'_>) {
    let n = u.int_in_range(1..=3usize).unwrap_or(1);
    let with_source: bool = u.arbitrary().unwrap_or(false);
    let lines = u.int_in_range(0..=6usize).unwrap_or(0);
    let columns: Vec<Vec<String>> = (0..n + usize::from(with_source)).map(|_| (0..lines).map(|_| line(u)).collect()).collect();
    let files: Vec<Vec<u8>> = columns
        .iter()
        .map(|c| {
            let (bom, crlf, nl) = (u.arbitrary().unwrap_or(false), u.arbitrary().unwrap_or(false), u.arbitrary().unwrap_or(true));
            file_of(c, bom, crlf, nl)
        })
        .collect();
    let streams: Vec<(&str, &[u8])> = files[..n].iter().map(|f| ("r", f.as_slice())).collect();
    let source = with_source.then(|| ("s", files[n].as_slice()));
    let segs = parse_plain(&streams, source).unwrap_or_else(|e| panic!("a well-formed plain set was refused: {e}"));
    assert_eq!(segs.len(), lines);
    for (i, s) in segs.iter().enumerate() {
        assert_eq!(s.id, (i + 1).to_string());
        assert!(s.refs.iter().zip(&columns).all(|(r, c)| *r == c[i]), "references differ from the file's lines");
        assert_eq!(s.source.as_ref(), with_source.then(|| &columns[n][i]));
    }
    let set = RefSet::new(segs).expect("valid set");
    assert_eq!(set.reference_count(), lines * n);
    round_trip(&set, None);
    // One stream with a line more than the others is refused, naming that stream and line.
    if lines > 0 && n > 1 {
        let mut longer = columns[1].clone();
        longer.push("extra".into());
        let f = file_of(&longer, false, false, true);
        let e = parse_plain(&[("a", &files[0]), ("b", &f)], None).expect_err("misaligned streams");
        assert_eq!((e.file.as_str(), e.line), ("b", Some(lines + 1)), "{e}");
    }
}

fuzz_target!(|data: &[u8]| {
    // Arbitrary bytes as an encoded set: never a panic, and what decodes re-encodes to itself.
    if let Ok(set) = RefSet::decode(data, None) {
        assert_eq!(set.encode(), data, "decode accepted a non-canonical encoding");
    }
    raw(&mut Unstructured::new(data));
    structured(&mut Unstructured::new(data));
});
