//! Parsers for the two reference formats, over bytes already read (no I/O here):
//!
//! - line-aligned plain text: one file per reference stream, segment id = line number (from 1),
//!   optionally an aligned source file;
//! - JSONL: one object per line, `{"id": "...", "source": "...", "refs": ["...", ...]}`
//!   (`source` optional, `id` a string or an integer, other keys ignored).
//!
//! Lines end with `\n`; a `\r` before it is dropped, and so is a UTF-8 byte-order mark at the start
//! of a file. Every error names the file and the line.

use std::fmt;

use serde::Deserialize;

use super::SegmentInput;

/// An input that cannot be used, with the file (and line) it comes from.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct InputError {
    /// File name as given by the user (`<stdin>` for standard input).
    pub file: String,
    /// 1-based line number, when the problem is on one line.
    pub line: Option<usize>,
    /// What is wrong.
    pub message: String,
}

impl InputError {
    /// An error on line `line` of `file`.
    pub fn at(file: &str, line: usize, message: impl Into<String>) -> Self {
        InputError { file: file.to_owned(), line: Some(line), message: message.into() }
    }
    /// An error about `file` as a whole.
    pub fn file(file: &str, message: impl Into<String>) -> Self {
        InputError { file: file.to_owned(), line: None, message: message.into() }
    }
}

impl fmt::Display for InputError {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self.line {
            Some(l) => write!(f, "{}:{}: {}", self.file, l, self.message),
            None => write!(f, "{}: {}", self.file, self.message),
        }
    }
}

impl std::error::Error for InputError {}

pub(super) const BOM: &[u8] = b"\xEF\xBB\xBF";

/// Split a file's bytes into lines, checking that each is valid UTF-8.
pub fn split_lines<'a>(file: &str, bytes: &'a [u8]) -> Result<Vec<&'a str>, InputError> {
    let bytes = bytes.strip_prefix(BOM).unwrap_or(bytes);
    if bytes.is_empty() {
        return Ok(Vec::new());
    }
    let body = bytes.strip_suffix(b"\n").unwrap_or(bytes);
    body.split(|&b| b == b'\n')
        .enumerate()
        .map(|(i, line)| {
            let line = line.strip_suffix(b"\r").unwrap_or(line);
            std::str::from_utf8(line).map_err(|e| {
                InputError::at(file, i + 1, format!("invalid UTF-8 at byte {} of the line", e.valid_up_to() + 1))
            })
        })
        .collect()
}

/// Segments from line-aligned reference streams (and an optional aligned source file).
/// `streams` are (file name, bytes) pairs; there must be at least one.
pub fn parse_plain(streams: &[(&str, &[u8])], source: Option<(&str, &[u8])>) -> Result<Vec<SegmentInput>, InputError> {
    let Some(&(first_name, _)) = streams.first() else {
        return Err(InputError::file("<references>", "no reference file given"));
    };
    let columns: Vec<Vec<&str>> = streams.iter().map(|(n, b)| split_lines(n, b)).collect::<Result<_, _>>()?;
    let lines = columns[0].len();
    let src = source.map(|(n, b)| split_lines(n, b).map(|l| (n, l))).transpose()?;
    let named = streams.iter().map(|(n, _)| *n).zip(columns.iter().map(Vec::len));
    for (name, len) in named.chain(src.as_ref().map(|(n, l)| (*n, l.len()))) {
        check_same_length(name, len, first_name, lines)?;
    }
    Ok((0..lines)
        .map(|i| SegmentInput {
            id: (i + 1).to_string(),
            source: src.as_ref().map(|(_, l)| l[i].to_owned()),
            refs: columns.iter().map(|c| c[i].to_owned()).collect(),
        })
        .collect())
}

/// An error when `file` has `len` lines where `expected_from` has `expected`.
pub fn check_same_length(file: &str, len: usize, expected_from: &str, expected: usize) -> Result<(), InputError> {
    match len.cmp(&expected) {
        std::cmp::Ordering::Equal => Ok(()),
        std::cmp::Ordering::Less => Err(InputError::at(
            file,
            len + 1,
            format!("file ends after {len} lines, but {expected_from} has {expected}"),
        )),
        std::cmp::Ordering::Greater => Err(InputError::at(
            file,
            expected + 1,
            format!("extra line: {expected_from} has only {expected} lines (this file has {len})"),
        )),
    }
}

#[derive(Deserialize)]
#[serde(untagged)]
enum JsonId {
    Text(String),
    Number(u64),
}

#[derive(Deserialize)]
struct JsonSegment {
    id: JsonId,
    #[serde(default)]
    source: Option<String>,
    refs: Vec<String>,
}

/// Segments from a JSONL file.
pub fn parse_jsonl(file: &str, bytes: &[u8]) -> Result<Vec<SegmentInput>, InputError> {
    split_lines(file, bytes)?
        .into_iter()
        .enumerate()
        .map(|(i, line)| {
            let at = |m: String| InputError::at(file, i + 1, m);
            if line.trim().is_empty() {
                return Err(at("empty line (expected a JSON object with \"id\" and \"refs\")".into()));
            }
            let seg: JsonSegment = serde_json::from_str(line).map_err(|e| at(format!("malformed JSON object: {e}")))?;
            let id = match seg.id {
                JsonId::Text(s) => s,
                JsonId::Number(n) => n.to_string(),
            };
            if id.is_empty() {
                return Err(at("empty \"id\"".into()));
            }
            if seg.refs.is_empty() {
                return Err(at(format!("segment '{id}' has an empty \"refs\" list (at least one reference is needed)")));
            }
            Ok(SegmentInput { id, source: seg.source, refs: seg.refs })
        })
        .collect()
}

#[cfg(test)]
mod tests {
    use super::*;
    use proptest::prelude::*;

    #[test]
    fn lines_strip_bom_and_crlf() {
        assert_eq!(split_lines("f", b"\xEF\xBB\xBFa\r\nb\n").unwrap(), ["a", "b"]);
        assert_eq!(split_lines("f", b"a\n\nb").unwrap(), ["a", "", "b"]);
        assert!(split_lines("f", b"").unwrap().is_empty());
        assert_eq!(split_lines("f", b"\n").unwrap(), [""]);
    }

    #[test]
    fn invalid_utf8_names_file_and_line() {
        let e = split_lines("hyp.txt", b"ok\nbad \xFF\n").unwrap_err();
        assert_eq!(e.to_string(), "hyp.txt:2: invalid UTF-8 at byte 5 of the line");
    }

    #[test]
    fn plain_streams_must_align() {
        let ok = parse_plain(&[("r1", b"a\nb\n"), ("r2", b"c\nd")], Some(("src", b"x\ny\n"))).unwrap();
        assert_eq!(ok[1], SegmentInput { id: "2".into(), source: Some("y".into()), refs: vec!["b".into(), "d".into()] });
        let e = parse_plain(&[("r1", b"a\nb\n"), ("r2", b"c\n")], None).unwrap_err();
        assert_eq!(e.to_string(), "r2:2: file ends after 1 lines, but r1 has 2");
        let e = parse_plain(&[("r1", b"a\n")], Some(("src", b"x\ny\n"))).unwrap_err();
        assert_eq!(e.line, Some(2));
    }

    #[test]
    fn jsonl_records() {
        let segs = parse_jsonl("r.jsonl", br#"{"id": 7, "refs": ["a", ""], "note": 1}
{"id": "x", "source": "s", "refs": ["b"]}
"#)
        .unwrap();
        assert_eq!(segs[0].id, "7");
        assert_eq!(segs[0].refs, ["a", ""]);
        assert_eq!(segs[1].source.as_deref(), Some("s"));
        for (bad, line) in [
            (&b"{\"id\": \"a\", \"refs\": []}\n"[..], 1),
            (b"{\"id\": \"a\", \"refs\": [\"x\"]}\n{\"id\": \"b\"}\n", 2),
            (b"{\"id\": \"a\", \"refs\": [\"x\"]}\n\n", 2),
            (b"not json\n", 1),
            (b"{\"id\": \"\", \"refs\": [\"x\"]}", 1),
        ] {
            let e = parse_jsonl("r.jsonl", bad).unwrap_err();
            assert_eq!(e.line, Some(line), "{e}");
            assert!(e.to_string().starts_with(&format!("r.jsonl:{line}: ")));
        }
    }

    proptest! {
        #[test]
        fn parsers_never_panic(bytes in proptest::collection::vec(any::<u8>(), 0..300)) {
            let _ = parse_jsonl("f", &bytes);
            let _ = parse_plain(&[("a", &bytes), ("b", &bytes)], Some(("s", &bytes)));
        }

        #[test]
        fn lines_round_trip(lines in proptest::collection::vec("[^\n\r\u{FEFF}]*", 0..20)) {
            let text: String = lines.iter().map(|l| format!("{l}\n")).collect();
            let got = split_lines("f", text.as_bytes()).unwrap();
            prop_assert_eq!(got, lines.iter().map(String::as_str).collect::<Vec<_>>());
        }
    }
}
