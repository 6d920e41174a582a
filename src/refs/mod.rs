//! Reference sets: segments with an id, an optional source and one or more references.
//!
//! A [`RefSet`] holds the texts compactly (one string arena, offsets) and a content digest
//! (SHA-256 over a canonical encoding) so that replicas and sessions can prove they score against
//! the same references. [`compiled::Compiled`] turns a set into the tables the scoring hot path
//! uses for one tokenizer configuration.

pub mod compiled;
mod intern;
mod load;
pub mod oneshot;
mod parse;

use std::fmt;

use sha2::{Digest, Sha256};

pub use load::{load, LoadError, RefFormat};
pub use parse::{check_same_length, parse_jsonl, parse_plain, split_lines, InputError};

/// Prefix of the canonical encoding hashed into a reference set's digest; bump the version when
/// the encoding changes.
const DIGEST_DOMAIN: &[u8] = b"mtgauge refset v1\n";

/// One segment as given by a parser (and as a JSONL reference line is written).
#[derive(Debug, Clone, PartialEq, Eq, serde::Serialize)]
pub struct SegmentInput {
    /// Segment id, unique within the set.
    pub id: String,
    /// Source text, when known.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub source: Option<String>,
    /// References (one or more; an empty string is an allowed, empty reference).
    pub refs: Vec<String>,
}

impl SegmentInput {
    /// The source text, or "" when it is not known.
    pub fn source_text(&self) -> &str {
        self.source.as_deref().unwrap_or("")
    }
}

/// Why a set of segments is not a valid reference set.
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
pub enum RefSetError {
    /// Two segments share an id.
    #[error("duplicate segment id '{id}' (segments {first} and {second})")]
    DuplicateId {
        /// The id.
        id: String,
        /// 1-based position of the first segment with it.
        first: usize,
        /// 1-based position of the second.
        second: usize,
    },
    /// A segment without any reference.
    #[error("segment '{0}' has no reference")]
    NoReference(String),
    /// An empty id.
    #[error("segment {0} has an empty id")]
    EmptyId(usize),
    /// Larger than the arena's 32-bit offsets allow.
    #[error("reference set too large ({0} bytes of text; at most 4 GiB)")]
    TooLarge(usize),
}

/// A reference set in memory.
#[derive(Clone)]
pub struct RefSet {
    /// All texts, concatenated.
    arena: String,
    /// End offset in `arena` of every field; a segment's fields are its id, its source (empty
    /// when absent), then its references.
    ends: Vec<u32>,
    /// Index into `ends` of each segment's first field, plus one final entry.
    first_field: Vec<u32>,
    /// Whether each segment has a source.
    has_source: Vec<bool>,
    /// Segment index by id.
    by_id: rustc_hash::FxHashMap<Box<str>, u32>,
    digest: [u8; 32],
}

/// A view of one segment of a [`RefSet`].
#[derive(Debug, Clone, Copy)]
pub struct Segment<'a> {
    set: &'a RefSet,
    index: usize,
}

impl<'a> Segment<'a> {
    fn field(&self, k: usize) -> &'a str {
        let f = self.set.first_field[self.index] as usize + k;
        let start = if f == 0 { 0 } else { self.set.ends[f - 1] as usize };
        &self.set.arena[start..self.set.ends[f] as usize]
    }
    /// Position of the segment in its set (0-based).
    pub fn index(&self) -> usize {
        self.index
    }
    /// Segment id.
    pub fn id(&self) -> &'a str {
        self.field(0)
    }
    /// Source text, when known.
    pub fn source(&self) -> Option<&'a str> {
        self.set.has_source[self.index].then(|| self.field(1))
    }
    /// Number of references.
    pub fn ref_count(&self) -> usize {
        (self.set.first_field[self.index + 1] - self.set.first_field[self.index]) as usize - 2
    }
    /// Reference `k`.
    pub fn reference(&self, k: usize) -> &'a str {
        self.field(2 + k)
    }
    /// All references.
    pub fn refs(&self) -> impl ExactSizeIterator<Item = &'a str> + 'a {
        let s = *self;
        (0..s.ref_count()).map(move |k| s.reference(k))
    }
}

impl RefSet {
    /// Build a set, checking ids and references.
    pub fn new(segments: impl IntoIterator<Item = SegmentInput>) -> Result<RefSet, RefSetError> {
        let mut set = RefSet {
            arena: String::new(),
            ends: Vec::new(),
            first_field: vec![0],
            has_source: Vec::new(),
            by_id: Default::default(),
            digest: [0; 32],
        };
        let mut digest = SetDigest::new();
        let mut encoded = Vec::new();
        for (i, seg) in segments.into_iter().enumerate() {
            if seg.id.is_empty() {
                return Err(RefSetError::EmptyId(i + 1));
            }
            if seg.refs.is_empty() {
                return Err(RefSetError::NoReference(seg.id));
            }
            if let Some(&first) = set.by_id.get(seg.id.as_str()) {
                return Err(RefSetError::DuplicateId { id: seg.id, first: first as usize + 1, second: i + 1 });
            }
            set.by_id.insert(seg.id.as_str().into(), i as u32);
            encoded.clear();
            SetDigest::segment_head(&mut encoded, seg.id.as_bytes(), seg.source.as_deref().map(str::as_bytes), seg.refs.len());
            set.push_field(&seg.id)?;
            set.push_field(seg.source.as_deref().unwrap_or(""))?;
            set.has_source.push(seg.source.is_some());
            for r in &seg.refs {
                SetDigest::field(&mut encoded, r.as_bytes());
                set.push_field(r)?;
            }
            digest.update(&encoded);
            set.first_field.push(set.ends.len() as u32);
        }
        set.digest = digest.finish();
        set.arena.shrink_to_fit();
        set.ends.shrink_to_fit();
        Ok(set)
    }

    fn push_field(&mut self, s: &str) -> Result<(), RefSetError> {
        self.arena.push_str(s);
        let end = u32::try_from(self.arena.len()).map_err(|_| RefSetError::TooLarge(self.arena.len()))?;
        self.ends.push(end);
        Ok(())
    }

    /// Number of segments.
    pub fn len(&self) -> usize {
        self.has_source.len()
    }

    /// True for a set without segments.
    pub fn is_empty(&self) -> bool {
        self.has_source.is_empty()
    }

    /// Segment `i` (0-based). Panics when out of range, like slice indexing.
    pub fn segment(&self, i: usize) -> Segment<'_> {
        assert!(i < self.len(), "segment index {i} out of range");
        Segment { set: self, index: i }
    }

    /// All segments in order.
    pub fn segments(&self) -> impl ExactSizeIterator<Item = Segment<'_>> + '_ {
        (0..self.len()).map(move |i| Segment { set: self, index: i })
    }

    /// Index of the segment with `id`.
    pub fn find(&self, id: &str) -> Option<usize> {
        self.by_id.get(id).map(|&i| i as usize)
    }

    /// Total number of references over all segments.
    pub fn reference_count(&self) -> usize {
        self.ends.len() - 2 * self.len()
    }

    /// SHA-256 of the canonical encoding (domain tag, then per segment: id, source flag and
    /// source, reference count, references; strings length-prefixed as 64-bit little endian).
    pub fn digest(&self) -> [u8; 32] {
        self.digest
    }

    /// The digest as lowercase hex.
    pub fn digest_hex(&self) -> String {
        hex(&self.digest)
    }

    /// The canonical encoding the digest is computed over: it holds the whole set, so
    /// [`RefSet::decode`] rebuilds it (durable storage keeps reference sets this way).
    pub fn encode(&self) -> Vec<u8> {
        let mut out = Vec::with_capacity(DIGEST_DOMAIN.len() + self.arena.len() + 24 * self.ends.len());
        out.extend_from_slice(DIGEST_DOMAIN);
        for seg in self.segments() {
            SetDigest::segment_head(&mut out, seg.id().as_bytes(), seg.source().map(str::as_bytes), seg.ref_count());
            for r in seg.refs() {
                SetDigest::field(&mut out, r.as_bytes());
            }
        }
        out
    }

    /// Rebuild a set from [`RefSet::encode`]'s bytes; the result's digest is checked against
    /// `expected_digest` when given (so damaged bytes are never taken for the set).
    pub fn decode(bytes: &[u8], expected_digest: Option<&[u8; 32]>) -> Result<RefSet, String> {
        let mut rest = bytes.strip_prefix(DIGEST_DOMAIN).ok_or("not a reference-set encoding (bad header)")?;
        let u64_at = |rest: &mut &[u8]| -> Result<u64, String> {
            let (head, tail) = rest.split_first_chunk::<8>().ok_or("truncated reference-set encoding")?;
            *rest = tail;
            Ok(u64::from_le_bytes(*head))
        };
        fn text(rest: &mut &[u8], n: u64) -> Result<String, String> {
            let n = usize::try_from(n).map_err(|_| "field too long")?;
            if rest.len() < n {
                return Err("truncated reference-set encoding".into());
            }
            let (head, tail) = rest.split_at(n);
            *rest = tail;
            String::from_utf8(head.to_vec()).map_err(|_| "invalid UTF-8 in reference-set encoding".into())
        }
        let mut segments = Vec::new();
        while !rest.is_empty() {
            let n = u64_at(&mut rest)?;
            let id = text(&mut rest, n)?;
            let (&flag, tail) = rest.split_first().ok_or("truncated reference-set encoding")?;
            rest = tail;
            let source = match flag {
                0 => None,
                1 => {
                    let n = u64_at(&mut rest)?;
                    Some(text(&mut rest, n)?)
                }
                _ => return Err("bad source flag in reference-set encoding".into()),
            };
            let count = u64_at(&mut rest)?;
            let mut refs = Vec::new();
            for _ in 0..count {
                let n = u64_at(&mut rest)?;
                refs.push(text(&mut rest, n)?);
            }
            segments.push(SegmentInput { id, source, refs });
        }
        let set = RefSet::new(segments).map_err(|e| e.to_string())?;
        if let Some(d) = expected_digest {
            if set.digest() != *d {
                return Err(format!("digest mismatch: stored {} but content hashes to {}", hex(d), set.digest_hex()));
            }
        }
        Ok(set)
    }

    /// Approximate heap bytes held by the set.
    pub fn memory_bytes(&self) -> usize {
        self.arena.capacity()
            + self.ends.capacity() * 4
            + self.first_field.capacity() * 4
            + self.has_source.capacity()
            + self.by_id.capacity() * (std::mem::size_of::<(Box<str>, u32)>() + 1)
            + self.by_id.keys().map(|k| k.len()).sum::<usize>()
    }
}

impl fmt::Debug for RefSet {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.debug_struct("RefSet")
            .field("segments", &self.len())
            .field("references", &self.reference_count())
            .field("digest", &self.digest_hex())
            .finish()
    }
}

/// Lowercase hex of bytes.
pub fn hex(bytes: &[u8]) -> String {
    bytes.iter().map(|b| format!("{b:02x}")).collect()
}

/// The SHA-256 of a reference set's canonical encoding (see [`RefSet::digest`]), fed segment by
/// segment with the encoding [`SetDigest::segment_head`] and [`SetDigest::field`] write.
pub(crate) struct SetDigest(Sha256);

impl SetDigest {
    /// A hash that has taken the domain tag.
    pub(crate) fn new() -> SetDigest {
        let mut h = Sha256::new();
        h.update(DIGEST_DOMAIN);
        SetDigest(h)
    }

    /// Append the encoding of a segment's id, source and reference count to `out` (its
    /// references follow, each a [`SetDigest::field`]).
    pub(crate) fn segment_head(out: &mut Vec<u8>, id: &[u8], source: Option<&[u8]>, refs: usize) {
        SetDigest::field(out, id);
        match source {
            Some(s) => {
                out.push(1);
                SetDigest::field(out, s);
            }
            None => out.push(0),
        }
        out.extend_from_slice(&(refs as u64).to_le_bytes());
    }

    /// Append one length-prefixed string to `out`.
    pub(crate) fn field(out: &mut Vec<u8>, bytes: &[u8]) {
        out.extend_from_slice(&(bytes.len() as u64).to_le_bytes());
        out.extend_from_slice(bytes);
    }

    /// Hash encoded bytes.
    pub(crate) fn update(&mut self, bytes: &[u8]) {
        self.0.update(bytes);
    }

    /// The digest.
    pub(crate) fn finish(self) -> [u8; 32] {
        self.0.finalize().into()
    }
}

#[cfg(test)]
mod tests {
    #[test]
    fn encoding_round_trips_and_hashes_to_the_digest() {
        use sha2::Digest;
        let seg = |id: &str, src: Option<&str>, refs: &[&str]| SegmentInput { id: id.into(), source: src.map(Into::into), refs: refs.iter().map(|r| r.to_string()).collect() };
        let set = RefSet::new(vec![seg("a", Some("Gate C closes."), &["Gate C schließt.", ""]), seg("b", None, &["Deck 4"])]).unwrap();
        let bytes = set.encode();
        let sha: [u8; 32] = Sha256::digest(&bytes).into();
        assert_eq!(sha, set.digest(), "the digest is the SHA-256 of the encoding");
        let back = RefSet::decode(&bytes, Some(&set.digest())).unwrap();
        assert_eq!(back.encode(), bytes);
        assert_eq!(back.segment(0).reference(1), "");
        assert_eq!(back.segment(1).source(), None);
        let mut bad = bytes.clone();
        *bad.last_mut().unwrap() ^= 1;
        assert!(RefSet::decode(&bad, Some(&set.digest())).unwrap_err().contains("digest mismatch"));
        assert!(RefSet::decode(&bytes[..bytes.len() - 3], None).is_err());
        assert!(RefSet::decode(b"junk", None).is_err());
    }

    use super::*;

    fn seg(id: &str, src: Option<&str>, refs: &[&str]) -> SegmentInput {
        SegmentInput { id: id.into(), source: src.map(Into::into), refs: refs.iter().map(|s| s.to_string()).collect() }
    }

    #[test]
    fn fields_round_trip() {
        let set = RefSet::new([seg("a", Some("src"), &["r1", ""]), seg("b", None, &["x y"])]).unwrap();
        assert_eq!(set.len(), 2);
        assert_eq!(set.reference_count(), 3);
        let a = set.segment(0);
        assert_eq!((a.id(), a.source(), a.refs().collect::<Vec<_>>()), ("a", Some("src"), vec!["r1", ""]));
        let b = set.segment(1);
        assert_eq!((b.id(), b.source(), b.ref_count()), ("b", None, 1));
        assert_eq!(set.find("b"), Some(1));
        assert_eq!(set.find("c"), None);
    }

    #[test]
    fn invalid_sets_are_refused() {
        assert!(matches!(RefSet::new([seg("a", None, &["x"]), seg("a", None, &["y"])]), Err(RefSetError::DuplicateId { .. })));
        assert!(matches!(RefSet::new([seg("a", None, &[])]), Err(RefSetError::NoReference(_))));
        assert!(matches!(RefSet::new([seg("", None, &["x"])]), Err(RefSetError::EmptyId(1))));
    }

    #[test]
    fn digest_depends_on_every_field_and_boundary() {
        let base = RefSet::new([seg("a", None, &["xy", "z"])]).unwrap().digest();
        for other in [
            vec![seg("a", None, &["x", "yz"])],
            vec![seg("a", Some(""), &["xy", "z"])],
            vec![seg("b", None, &["xy", "z"])],
            vec![seg("a", None, &["xy"]), seg("z", None, &["z"])],
        ] {
            assert_ne!(RefSet::new(other).unwrap().digest(), base);
        }
        assert_eq!(RefSet::new([seg("a", None, &["xy", "z"])]).unwrap().digest(), base);
    }
}
