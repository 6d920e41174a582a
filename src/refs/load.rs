//! The one way a reference set is made from its input files: a format and named byte buffers
//! (reading the files is the caller's: the CLI reads the user's paths, the server its
//! reference-set directory or an upload). Pure: no I/O.

use std::path::Path;

use super::{parse_jsonl, parse_plain, InputError, RefSet};

/// How reference-set input is laid out.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum RefFormat {
    /// Line-aligned plain text: one file per reference stream (segment id = line number from
    /// 1), optionally with an aligned source file.
    Plain,
    /// One JSONL file of `{"id", "source", "refs"}` objects.
    Jsonl,
}

impl RefFormat {
    /// The format a list of files suggests: JSONL for one file named `*.jsonl` or `*.ndjson`,
    /// else plain.
    pub fn detect<P: AsRef<Path>>(paths: &[P]) -> RefFormat {
        let jsonl_name = |p: &Path| p.extension().and_then(|e| e.to_str()).is_some_and(|e| e.eq_ignore_ascii_case("jsonl") || e.eq_ignore_ascii_case("ndjson"));
        if paths.len() == 1 && jsonl_name(paths[0].as_ref()) {
            RefFormat::Jsonl
        } else {
            RefFormat::Plain
        }
    }
}

/// Why reference-set input does not make a set.
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
pub enum LoadError {
    /// A file does not parse (names the file and line).
    #[error("{0}")]
    Input(#[from] InputError),
    /// JSONL input of more or fewer than one file.
    #[error("a JSONL reference set is exactly one file, got {0}")]
    JsonlFiles(usize),
    /// JSONL input with a separate source file (JSONL carries its sources).
    #[error("a JSONL reference set carries its sources; drop the source file")]
    JsonlSource,
    /// Plain input without a reference file.
    #[error("a plain reference set needs at least one reference file")]
    NoReferences,
    /// The parsed segments are not a valid set (duplicate ids, ...); names the first file.
    #[error("{file}: {message}")]
    Set {
        /// The first input file.
        file: String,
        /// What is wrong.
        message: String,
    },
}

/// Parse a reference set of `format` from named buffers (`files`: the JSONL file or the
/// reference streams; `source`: plain text's aligned source file).
pub fn load(format: RefFormat, files: &[(&str, &[u8])], source: Option<(&str, &[u8])>) -> Result<RefSet, LoadError> {
    let segments = match format {
        RefFormat::Jsonl => {
            if files.len() != 1 {
                return Err(LoadError::JsonlFiles(files.len()));
            }
            if source.is_some() {
                return Err(LoadError::JsonlSource);
            }
            parse_jsonl(files[0].0, files[0].1)?
        }
        RefFormat::Plain => {
            if files.is_empty() {
                return Err(LoadError::NoReferences);
            }
            parse_plain(files, source)?
        }
    };
    RefSet::new(segments).map_err(|e| LoadError::Set { file: files[0].0.to_owned(), message: e.to_string() })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn formats_are_detected_and_checked() {
        assert_eq!(RefFormat::detect(&["refs.JSONL"]), RefFormat::Jsonl);
        assert_eq!(RefFormat::detect(&["a.ndjson"]), RefFormat::Jsonl);
        assert_eq!(RefFormat::detect(&["a.jsonl", "b.jsonl"]), RefFormat::Plain);
        assert_eq!(RefFormat::detect(&["ref.de.txt"]), RefFormat::Plain);
        let jsonl: &[u8] = b"{\"id\": \"a\", \"refs\": [\"Gate C\"]}\n";
        assert_eq!(load(RefFormat::Jsonl, &[("r.jsonl", jsonl)], None).unwrap().len(), 1);
        assert_eq!(load(RefFormat::Jsonl, &[("r.jsonl", jsonl), ("s.jsonl", jsonl)], None).unwrap_err(), LoadError::JsonlFiles(2));
        assert_eq!(load(RefFormat::Jsonl, &[("r.jsonl", jsonl)], Some(("src.txt", b"x\n"))).unwrap_err(), LoadError::JsonlSource);
        assert_eq!(load(RefFormat::Plain, &[], None).unwrap_err(), LoadError::NoReferences);
        let plain = load(RefFormat::Plain, &[("r1.txt", b"Tor C\nDeck 4\n"), ("r2.txt", b"Gate C\nDeck four\n")], Some(("src.txt", b"Gate C\nDeck 4\n"))).unwrap();
        assert_eq!((plain.len(), plain.reference_count()), (2, 4));
        let dup: &[u8] = b"{\"id\": \"a\", \"refs\": [\"x\"]}\n{\"id\": \"a\", \"refs\": [\"y\"]}\n";
        assert!(matches!(load(RefFormat::Jsonl, &[("d.jsonl", dup)], None).unwrap_err(), LoadError::Set { file, .. } if file == "d.jsonl"));
    }
}
