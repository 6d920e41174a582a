//! The target language's vocabulary learned from a reference set: the words (as the guards
//! hash them, [`super::for_each_word`]) of the human references, held in a blocked Bloom filter.
//!
//! The language guard's first screen ([`super::GuardConfig::vocab_share`]): a hypothesis whose
//! words are mostly words the set's references use is in the references' language, which
//! [`learn`] checks is the declared target before the vocabulary is used. A Bloom filter can
//! answer "known" for an unknown word (about 1% of unknown words at [`BITS_PER_WORD`]), never
//! "unknown" for a known one; a false "known" can only move a share up.

use std::fmt;

use rustc_hash::FxHashSet;

use super::{language_outcome, script_counts, GuardConfig, Outcome};

/// Bits of the filter per distinct word (three of them set per word, in one 64-bit block).
pub const BITS_PER_WORD: usize = 16;

/// Most references [`learn`] identifies to check they are in the target language (spread evenly
/// over the set).
pub const LANGUAGE_CHECK_SAMPLE: usize = 256;

/// Largest share of the sampled references the language guard may flag for the vocabulary
/// still to be used (our choice: a set in the target language has next to none; a set in another
/// language has most of them flagged).
pub const LANGUAGE_CHECK_MAX_FLAGGED: f64 = 0.1;

/// A set of words, approximate (see the module's note): [`Vocabulary::contains`] is one load.
#[derive(Clone, PartialEq, Eq)]
pub struct Vocabulary {
    blocks: Vec<u64>,
    /// log2 of the number of blocks.
    shift: u32,
    words: usize,
}

impl fmt::Debug for Vocabulary {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(f, "Vocabulary({} words, {} bytes)", self.words, self.memory_bytes())
    }
}

impl Vocabulary {
    /// The vocabulary of `words` (word ids; repeats are fine).
    pub fn of_ids(words: impl IntoIterator<Item = u64>) -> Vocabulary {
        let distinct: FxHashSet<u64> = words.into_iter().collect();
        let blocks = (distinct.len() * BITS_PER_WORD).div_ceil(64).max(1).next_power_of_two();
        let mut v = Vocabulary { blocks: vec![0; blocks], shift: blocks.trailing_zeros(), words: distinct.len() };
        for id in distinct {
            let (b, mask) = v.slot(id);
            v.blocks[b] |= mask;
        }
        v
    }

    /// The vocabulary of every word with a letter in `texts`.
    pub fn of_texts<'a>(texts: impl IntoIterator<Item = &'a str>) -> Vocabulary {
        let mut ids = Vec::new();
        for t in texts {
            super::for_each_word(t, |id, letter| {
                if letter {
                    ids.push(id);
                }
            });
        }
        Vocabulary::of_ids(ids)
    }

    #[inline]
    fn slot(&self, id: u64) -> (usize, u64) {
        let x = id.wrapping_mul(0x9E37_79B9_7F4A_7C15);
        // The top `shift` bits (none when there is one block), with no branch: x >> (64 - shift)
        // in two shifts that stay below 64.
        let block = ((x >> 1) >> (63 - self.shift)) as usize;
        (block, (1u64 << (x & 63)) | (1u64 << ((x >> 6) & 63)) | (1u64 << ((x >> 12) & 63)))
    }

    /// True when `id` is (probably) one of the words.
    #[inline]
    pub fn contains(&self, id: u64) -> bool {
        let (b, mask) = self.slot(id);
        // (The index masked to the power-of-two length it is already below: no bounds check.)
        self.blocks[b & (self.blocks.len() - 1)] & mask == mask
    }

    /// Share of `text`'s words with a letter that are (probably) in the vocabulary, what the
    /// language guard's screen compares with its threshold; None when it has no such word.
    pub fn share(&self, text: &str) -> Option<f64> {
        let (mut known, mut lettered) = (0usize, 0usize);
        super::for_each_word(text, |id, letter| {
            if letter {
                lettered += 1;
                known += usize::from(self.contains(id));
            }
        });
        (lettered > 0).then(|| known as f64 / lettered as f64)
    }

    /// Distinct words learned.
    pub fn len(&self) -> usize {
        self.words
    }

    /// True when no word was learned.
    pub fn is_empty(&self) -> bool {
        self.words == 0
    }

    /// Bytes of the filter.
    pub fn memory_bytes(&self) -> usize {
        self.blocks.len() * 8
    }
}

/// What [`learn`] found.
#[derive(Debug, Clone, PartialEq)]
pub enum Learned {
    /// The vocabulary, to be used.
    Vocabulary(Vocabulary),
    /// Not learned: why (for status and reports).
    Skipped(&'static str),
}

/// The vocabulary of `references` for `cfg`'s language guard, when it can be used: a target is
/// declared, identification is on, the vocabulary screen is on, the target is not one its
/// script decides, and the references are in the target language (at most
/// [`LANGUAGE_CHECK_MAX_FLAGGED`] of up to [`LANGUAGE_CHECK_SAMPLE`] of them, spread evenly,
/// flagged by the language guard's identification, and at least one decided).
pub fn learn(cfg: &GuardConfig, references: &[&str]) -> Learned {
    let Some(target) = cfg.target else { return Learned::Skipped("no target language declared") };
    if !cfg.language_id {
        return Learned::Skipped("language identification is off");
    }
    if cfg.vocab_share.is_none() {
        return Learned::Skipped("the vocabulary screen is off");
    }
    if target.own_script || target.ident.is_none() {
        return Learned::Skipped("the target's script decides its language");
    }
    if references.is_empty() {
        return Learned::Skipped("no references");
    }
    let plain = GuardConfig { vocabulary: None, ..cfg.clone() };
    let step = references.len().div_ceil(LANGUAGE_CHECK_SAMPLE).max(1);
    let (mut decided, mut flagged) = (0usize, 0usize);
    for r in references.iter().step_by(step) {
        let (letters, expected) = script_counts(&plain, r);
        let script = super::script_of_counts(&plain, letters, expected);
        match language_outcome(&plain, r, letters, script == Outcome::Flag, None) {
            Outcome::Pass => decided += 1,
            Outcome::Flag => (decided, flagged) = (decided + 1, flagged + 1),
            Outcome::Undecided => {}
        }
    }
    if decided == 0 {
        return Learned::Skipped("the references are too short to tell their language");
    }
    if flagged as f64 > LANGUAGE_CHECK_MAX_FLAGGED * decided as f64 {
        return Learned::Skipped("the references do not look like the target language");
    }
    Learned::Vocabulary(Vocabulary::of_texts(references.iter().copied()))
}

impl GuardConfig {
    /// Learn the vocabulary of `references` into this configuration when it can be used
    /// ([`learn`]): its number of words, or why there is none.
    pub fn learn_vocabulary(&mut self, references: &[&str]) -> Result<usize, &'static str> {
        match learn(self, references) {
            Learned::Vocabulary(v) => {
                let words = v.len();
                self.vocabulary = Some(std::sync::Arc::new(v));
                Ok(words)
            }
            Learned::Skipped(why) => Err(why),
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn members_are_always_found_and_strangers_rarely() {
        let v = Vocabulary::of_ids((0..5_000u64).map(|i| i.wrapping_mul(0x2545_F491_4F6C_DD1D)));
        assert_eq!(v.len(), 5_000);
        assert!((0..5_000u64).all(|i| v.contains(i.wrapping_mul(0x2545_F491_4F6C_DD1D))));
        let strangers = (0..100_000u64).filter(|i| v.contains(i.wrapping_mul(0x9E37_79B9_7F4A_7C15) ^ 0xABCD)).count();
        // Blocked Bloom filter, 16 bits and 3 hashes a word: about 1% false members (common practice).
        assert!(strangers < 3_000, "{strangers} of 100000 strangers found");
        let v = Vocabulary::of_texts(["Die Fähre legt ab.", "1530 Uhr"]);
        assert_eq!(v.share("DIE FÄHRE, 12 Uhr!"), Some(1.0));
        assert_eq!(v.share("Die letzte Fähre"), Some(2.0 / 3.0));
        assert_eq!(v.share("12 34"), None);
        let empty = Vocabulary::of_ids([]);
        assert!(empty.is_empty() && !empty.contains(42));
    }
}
