//! Reference-free guards: deterministic rules that flag a hypothesis as broken from its source
//! alone (no reference needed), after the pathologies studied in the MT hallucination
//! literature (Raunak et al. 2021; Guerreiro et al. 2023) and the off-target-language problem of
//! multilingual MT (Zhang et al. 2020).
//!
//! | guard        | rule (thresholds in [`GuardConfig`], defaults the `DEFAULT_*` constants) |
//! |--------------|------|
//! | `empty`      | the hypothesis has no letter, mark or digit (`char::is_alphanumeric`): empty, white space or punctuation only |
//! | `copy`       | the hypothesis equals the source after normalisation (lowercased, only letters and digits kept; the source has at least one), or chrF of the hypothesis against the source as its reference (Popović 2015: character orders 1..=`copy_order`, beta `DEFAULT_CHRF_BETA`, text lowercased, white space removed) is at least `copy_min_chrf` |
//! | `length`     | hypothesis/source length ratio (non-space characters) divided by the expected ratio is below `length_low` or above `length_high`; undecided when the source has fewer than `length_min_chars` |
//! | `repetition` | the most frequent word n-gram (order `repeat_order`) occurs at least `repeat_count` times, or one word runs `repeat_run` times in a row, and more than in the source (same rule on the source); words are lowercased runs of letters, marks and digits, each CJK ideograph or kana a word of its own |
//! | `script`     | under `script_min_share` of the hypothesis' letters are in the target language's scripts; undecided without a declared target or without letters |
//! | `language`   | with at least `language_min_letters` letters: flags when the script guard flags (text mostly in another script is off-target whatever an identifier says); passes when the target's script is its own (`Language::own_script`: Greek, Thai); passes when at least `vocab_share` of its words with a letter are in the target vocabulary learned from the session's reference set ([`vocab::learn`]: the references' words, used only when the references themselves are identified as the target language); passes when the fast screen (crate `whichlang` 0.1.1, a linear model over hashed character n-grams, 16 languages) names the target; otherwise flags when the thorough identifier (crate `whatlang` 0.18.0, trigram profiles of 70 languages) is reliable and names another language; otherwise undecided (no declared target, fewer letters, identification not reliable, or switched off with `language_id`) |
//!
//! Each guard gives its own verdict; an item can trip several. Verdicts are a pair of bitsets
//! ([`Verdict`]); their counts ([`GuardCounts`]) are integers that add across batches,
//! replicas and order. Everything here is pure: no I/O, no global state; the check reuses the
//! buffers of a [`GuardScratch`].
//!
//! The vocabulary screen: a text whose words are mostly words human references in the target
//! language use is in that language (names, numbers and loan words are shared across languages,
//! hence a share, not every word); it costs one filter load per word where the identifiers
//! read every character (`mtgauge bench` times both). It can pass, never flag, and a language
//! close to the target that shares much of its vocabulary (Danish text against a Norwegian
//! set) can pass it. Sessions without references, and offline runs without them, have no
//! vocabulary and go to the identifiers.
//!
//! Language identification caveats. whatlang 0.18.0: trigram statistics need text; short
//! texts and texts full of names and numbers are often misidentified, and close languages
//! (Danish/Norwegian Bokmål, Croatian/Serbian in Latin letters, Indonesian/Malay) are confused.
//! The `language_min_letters` floor and the crate's own reliability flag (`Info::is_reliable`)
//! turn those cases into "undecided" rather than flags. whichlang 0.1.1 (the screen: 1.2 µs per
//! demo sentence of 100 characters against whatlang's 57 µs, and 99.2% correct on the demo's
//! German against whatlang's 94.9%, as `mtgauge bench` measures them) always names one of
//! its 16 languages and has no reliability measure, so it only ever lets an item pass: a text
//! in a language it does not know (Danish for a German or Swedish target, Ukrainian for a
//! Russian one) can be taken for the target and pass unflagged. Flags always come from
//! whatlang's reliable verdict (or the script guard).

mod scan;
mod script;
pub mod vocab;

use std::fmt;
use std::sync::Arc;

#[cfg(test)]
use scan::PRESENCE_BITS;
use scan::{scan_hypothesis, HypScan};
pub use scan::{scan_path, SourceFacts};
pub use script::{language, language_codes, script_of, Language, Script, LANGUAGES};
pub use vocab::Vocabulary;

use crate::metric::chrf::{ChrfStats, OrderCounts};
use crate::metric::ngram::{clipped_matches, ngram_count, sort_positions};
use crate::metric::{DEFAULT_CHRF_BETA, DEFAULT_CHRF_CHAR_ORDER, MAX_CHRF_CHAR_ORDER};
use unicode_general_category::{get_general_category, GeneralCategory};

use crate::text::is_space;

/// A guard.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum Guard {
    /// No letter or digit in the hypothesis.
    Empty,
    /// The source copied through.
    Copy,
    /// Far shorter or longer than the source.
    Length,
    /// Degenerate repetition.
    Repetition,
    /// Letters not in the target language's script.
    Script,
    /// Identified as another language than the target.
    Language,
}

/// Number of guards.
pub const GUARD_COUNT: usize = 6;

impl Guard {
    /// Every guard, in the order of their bits and of every listing.
    pub const ALL: [Guard; GUARD_COUNT] =
        [Guard::Empty, Guard::Copy, Guard::Length, Guard::Repetition, Guard::Script, Guard::Language];

    /// The name used in output, labels and settings.
    pub fn name(self) -> &'static str {
        match self {
            Guard::Empty => "empty",
            Guard::Copy => "copy",
            Guard::Length => "length",
            Guard::Repetition => "repetition",
            Guard::Script => "script",
            Guard::Language => "language",
        }
    }

    fn bit(self) -> u8 {
        1 << self as u8
    }
}

impl fmt::Display for Guard {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(self.name())
    }
}

/// One item's verdicts: which guards it tripped and which could not decide.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq, Hash)]
pub struct Verdict {
    /// Bit `g as u8` set when guard `g` flagged the item.
    pub flagged: u8,
    /// Bit `g as u8` set when guard `g` could not decide (and did not flag).
    pub undecided: u8,
}

impl Verdict {
    /// True when `g` flagged the item.
    pub fn is_flagged(self, g: Guard) -> bool {
        self.flagged & g.bit() != 0
    }
    /// True when `g` could not decide.
    pub fn is_undecided(self, g: Guard) -> bool {
        self.undecided & g.bit() != 0
    }
    /// True when any guard flagged the item.
    pub fn any(self) -> bool {
        self.flagged != 0
    }
    /// The guards that flagged the item, in [`Guard::ALL`] order.
    pub fn flagged_guards(self) -> impl Iterator<Item = Guard> {
        Guard::ALL.into_iter().filter(move |&g| self.is_flagged(g))
    }
    /// The guards that could not decide, in [`Guard::ALL`] order.
    pub fn undecided_guards(self) -> impl Iterator<Item = Guard> {
        Guard::ALL.into_iter().filter(move |&g| self.is_undecided(g))
    }
    fn set(&mut self, g: Guard, outcome: Outcome) {
        match outcome {
            Outcome::Pass => {}
            Outcome::Flag => self.flagged |= g.bit(),
            Outcome::Undecided => self.undecided |= g.bit(),
        }
    }
}

/// Counts of verdicts: additive over items, batches, replicas and order.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq, serde::Serialize, serde::Deserialize)]
pub struct GuardCounts {
    /// Items checked.
    pub checked: u64,
    /// Per guard (in [`Guard::ALL`] order), items it flagged.
    pub flagged: [u64; GUARD_COUNT],
    /// Per guard, items it could not decide.
    pub undecided: [u64; GUARD_COUNT],
}

impl GuardCounts {
    /// Count one item's verdict.
    pub fn add(&mut self, v: Verdict) {
        self.checked += 1;
        for g in Guard::ALL {
            self.flagged[g as usize] += u64::from(v.is_flagged(g));
            self.undecided[g as usize] += u64::from(v.is_undecided(g));
        }
    }
    /// Items flagged by `g`.
    pub fn flagged_by(&self, g: Guard) -> u64 {
        self.flagged[g as usize]
    }
    /// Items `g` could not decide.
    pub fn undecided_by(&self, g: Guard) -> u64 {
        self.undecided[g as usize]
    }
    /// Share of the items `g` decided on that it flagged (`None` when it decided on none).
    pub fn rate(&self, g: Guard) -> Option<f64> {
        let decided = self.checked.saturating_sub(self.undecided_by(g));
        (decided > 0).then(|| self.flagged_by(g) as f64 / decided as f64)
    }
}

impl std::ops::AddAssign for GuardCounts {
    fn add_assign(&mut self, o: Self) {
        self.checked += o.checked;
        for i in 0..GUARD_COUNT {
            self.flagged[i] += o.flagged[i];
            self.undecided[i] += o.undecided[i];
        }
    }
}

/// Default `copy_min_chrf`: chrF (0-100) of the hypothesis against the source at or above which
/// it counts as copied. Our choice (no published value): a translation shares names, numbers and
/// cognates with its source, but rarely 80 chrF points; measured on the demo corpus (tests).
pub const DEFAULT_COPY_MIN_CHRF: f64 = 80.0;
/// Default `copy_order`: character n-gram orders of the copy chrF (chrF's own default, Popović 2015/2016).
pub const DEFAULT_COPY_ORDER: usize = DEFAULT_CHRF_CHAR_ORDER;
/// Default expected hypothesis/source character ratio when none is configured or learned.
pub const DEFAULT_LENGTH_RATIO: f64 = 1.0;
/// Default lower bound of the length band, as a factor of the expected ratio (common practice:
/// length-ratio filters of parallel-corpus cleaning use factors of 1.5 to 3).
pub const DEFAULT_LENGTH_LOW: f64 = 0.5;
/// Default upper bound of the length band, as a factor of the expected ratio (common practice, as above).
pub const DEFAULT_LENGTH_HIGH: f64 = 2.0;
/// Default minimum number of non-space source characters for the length guard to decide
/// (common practice: ratios of very short texts are noise).
pub const DEFAULT_LENGTH_MIN_CHARS: usize = 10;
/// Default word n-gram order of the repetition guard. The count of the most repeated n-gram is a
/// hallucination detector in Raunak et al. 2021 and Guerreiro et al. 2023; order 4 from memory.
pub const DEFAULT_REPEAT_ORDER: usize = 4;
/// Default minimum occurrences of the most frequent n-gram to flag (common practice).
pub const DEFAULT_REPEAT_COUNT: usize = 3;
/// Default minimum run of one repeated word to flag (common practice).
pub const DEFAULT_REPEAT_RUN: usize = 4;
/// Largest configurable repetition order.
pub const MAX_REPEAT_ORDER: usize = 8;
/// Default minimum share of letters in the target's scripts (common practice: majority).
pub const DEFAULT_SCRIPT_MIN_SHARE: f64 = 0.5;
/// Default minimum letters for the language guard to decide (common practice: trigram
/// identifiers are unreliable on a few words).
pub const DEFAULT_LANGUAGE_MIN_LETTERS: usize = 30;

/// Default share of a hypothesis' words (those with a letter) found in the target vocabulary
/// learned from the reference set for the language guard to pass it without an identifier. Our
/// choice, measured on the demo corpus (tests): the German hypotheses of its three systems have
/// at least 0.60 of their words in the German references' vocabulary, its English sources at
/// most 0.50.
pub const DEFAULT_LANGUAGE_VOCAB_SHARE: f64 = 0.6;

/// Whether the language identifier runs unless told (on: the guard as the issue describes it).
pub const DEFAULT_LANGUAGE_ID: bool = true;

/// The guards' thresholds and the declared target language.
#[derive(Debug, Clone, PartialEq)]
pub struct GuardConfig {
    /// Declared target language (the script and language guards are undecided without it).
    pub target: Option<&'static Language>,
    /// chrF (0-100) against the source at or above which a hypothesis is a copy.
    pub copy_min_chrf: f64,
    /// Character orders of the copy chrF.
    pub copy_order: usize,
    /// Expected hypothesis/source character ratio.
    pub length_ratio: f64,
    /// Lower bound of the ratio / expected ratio band.
    pub length_low: f64,
    /// Upper bound of the band.
    pub length_high: f64,
    /// Minimum non-space source characters for the length guard to decide.
    pub length_min_chars: usize,
    /// Word n-gram order of the repetition guard.
    pub repeat_order: usize,
    /// Occurrences of the most frequent n-gram that flag.
    pub repeat_count: usize,
    /// Run of one word that flags.
    pub repeat_run: usize,
    /// Minimum share of letters in the target's scripts.
    pub script_min_share: f64,
    /// Minimum letters for the language guard to decide.
    pub language_min_letters: usize,
    /// Run the language identifier (the costliest guard by far: see `mtgauge bench`); off, the
    /// language guard only flags text mostly in another script and is undecided otherwise.
    pub language_id: bool,
    /// Share of a hypothesis' words with a letter that must be in [`GuardConfig::vocabulary`]
    /// for the language guard to pass it unidentified; None: the vocabulary screen is off.
    pub vocab_share: Option<f64>,
    /// The target language's words, learned from the session's reference set ([`vocab::learn`]);
    /// None without one.
    pub vocabulary: Option<Arc<Vocabulary>>,
}

impl Default for GuardConfig {
    fn default() -> Self {
        GuardConfig {
            target: None,
            copy_min_chrf: DEFAULT_COPY_MIN_CHRF,
            copy_order: DEFAULT_COPY_ORDER,
            length_ratio: DEFAULT_LENGTH_RATIO,
            length_low: DEFAULT_LENGTH_LOW,
            length_high: DEFAULT_LENGTH_HIGH,
            length_min_chars: DEFAULT_LENGTH_MIN_CHARS,
            repeat_order: DEFAULT_REPEAT_ORDER,
            repeat_count: DEFAULT_REPEAT_COUNT,
            repeat_run: DEFAULT_REPEAT_RUN,
            script_min_share: DEFAULT_SCRIPT_MIN_SHARE,
            language_min_letters: DEFAULT_LANGUAGE_MIN_LETTERS,
            language_id: DEFAULT_LANGUAGE_ID,
            vocab_share: Some(DEFAULT_LANGUAGE_VOCAB_SHARE),
            vocabulary: None,
        }
    }
}

/// A guard setting that is unknown or out of range.
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
pub enum GuardError {
    /// No such setting.
    #[error("unknown guard setting '{0}' (known: {keys})", keys = SETTING_KEYS.join(", "))]
    UnknownSetting(String),
    /// Not of the form KEY=VALUE.
    #[error("guard setting '{0}' is not KEY=VALUE")]
    Malformed(String),
    /// A value that does not parse or is out of its range.
    #[error("guard setting {key}={value}: {why}")]
    BadValue {
        /// The setting.
        key: String,
        /// Its value as given.
        value: String,
        /// What is wrong.
        why: &'static str,
    },
    /// An unknown target language.
    #[error("unknown target language '{0}' (known: {codes})", codes = language_codes())]
    UnknownLanguage(String),
}

/// The settings [`GuardConfig::set`] knows.
pub const SETTING_KEYS: [&str; 13] = [
    "copy-chrf",
    "copy-order",
    "length-ratio",
    "length-low",
    "length-high",
    "length-min-chars",
    "repeat-order",
    "repeat-count",
    "repeat-run",
    "script-share",
    "language-min-letters",
    "language-id",
    "language-vocab-share",
];

/// `--help` text of the guard settings, with their defaults.
pub fn settings_help() -> String {
    format!(
        "copy-chrf={DEFAULT_COPY_MIN_CHRF} copy-order={DEFAULT_COPY_ORDER} length-ratio={DEFAULT_LENGTH_RATIO} \
         length-low={DEFAULT_LENGTH_LOW} length-high={DEFAULT_LENGTH_HIGH} length-min-chars={DEFAULT_LENGTH_MIN_CHARS} \
         repeat-order={DEFAULT_REPEAT_ORDER} repeat-count={DEFAULT_REPEAT_COUNT} repeat-run={DEFAULT_REPEAT_RUN} \
         script-share={DEFAULT_SCRIPT_MIN_SHARE} language-min-letters={DEFAULT_LANGUAGE_MIN_LETTERS} language-id={} \
         language-vocab-share={DEFAULT_LANGUAGE_VOCAB_SHARE} (or off)",
        if DEFAULT_LANGUAGE_ID { "on" } else { "off" }
    )
}

impl GuardConfig {
    /// Declare the target language by ISO 639-1 or 639-3 code.
    pub fn with_target(mut self, code: &str) -> Result<Self, GuardError> {
        self.target = Some(language(code).ok_or_else(|| GuardError::UnknownLanguage(code.to_owned()))?);
        Ok(self)
    }

    /// Apply one `KEY=VALUE` setting (keys in [`SETTING_KEYS`]).
    pub fn set(&mut self, setting: &str) -> Result<(), GuardError> {
        let (key, value) = setting.split_once('=').ok_or_else(|| GuardError::Malformed(setting.to_owned()))?;
        let (key, value) = (key.trim(), value.trim());
        let bad = |why| GuardError::BadValue { key: key.to_owned(), value: value.to_owned(), why };
        let float = |lo: f64, hi: f64, why| value.parse::<f64>().ok().filter(|v| (lo..=hi).contains(v)).ok_or_else(|| bad(why));
        let int = |lo: usize, hi: usize, why| value.parse::<usize>().ok().filter(|v| (lo..=hi).contains(v)).ok_or_else(|| bad(why));
        match key {
            "copy-chrf" => self.copy_min_chrf = float(0.0, 100.0, "a chrF between 0 and 100")?,
            "copy-order" => self.copy_order = int(1, MAX_CHRF_CHAR_ORDER, "an order between 1 and 10")?,
            "length-ratio" => self.length_ratio = float(0.01, 100.0, "a ratio between 0.01 and 100")?,
            "length-low" => self.length_low = float(0.0, 1.0, "a factor between 0 and 1")?,
            "length-high" => self.length_high = float(1.0, 1000.0, "a factor between 1 and 1000")?,
            "length-min-chars" => self.length_min_chars = int(1, 1_000_000, "a count from 1")?,
            "repeat-order" => self.repeat_order = int(1, MAX_REPEAT_ORDER, "an order between 1 and 8")?,
            "repeat-count" => self.repeat_count = int(2, 1_000_000, "a count from 2")?,
            "repeat-run" => self.repeat_run = int(2, 1_000_000, "a count from 2")?,
            "script-share" => self.script_min_share = float(0.0, 1.0, "a share between 0 and 1")?,
            "language-min-letters" => self.language_min_letters = int(1, 1_000_000, "a count from 1")?,
            "language-id" => {
                self.language_id = match value {
                    "on" => true,
                    "off" => false,
                    _ => return Err(bad("on or off")),
                }
            }
            "language-vocab-share" => {
                self.vocab_share = match value {
                    "off" => None,
                    _ => Some(float(0.5, 1.0, "a share between 0.5 and 1, or off")?),
                }
            }
            _ => return Err(GuardError::UnknownSetting(key.to_owned())),
        }
        Ok(())
    }
}

/// Additive character counts of sources and their references, from which the expected length
/// ratio of a language pair is learned ([`LengthTally::ratio`]).
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq)]
pub struct LengthTally {
    /// Non-space characters of the sources.
    pub source_chars: u64,
    /// Non-space characters of the references (each reference counted against its source once).
    pub reference_chars: u64,
}

impl LengthTally {
    /// Count a source and one of its references.
    pub fn add(&mut self, source: &str, reference: &str) {
        self.source_chars += char_len(source);
        self.reference_chars += char_len(reference);
    }
    /// The learned ratio, when there is enough text (at least the length guard's minimum).
    pub fn ratio(&self, min_chars: usize) -> Option<f64> {
        (self.source_chars >= min_chars.max(1) as u64 && self.reference_chars > 0)
            .then(|| self.reference_chars as f64 / self.source_chars as f64)
    }
}

/// Where the length guard's expected ratio comes from.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum RatioFrom {
    /// The reference set's references against their sources ([`LengthTally`]).
    Learned,
    /// A `length-ratio` setting.
    Setting,
    /// [`DEFAULT_LENGTH_RATIO`]: no setting, and too little source text to learn from.
    Default,
}

impl RatioFrom {
    /// Its name in reports and the API: "learned", "setting" or "default".
    pub fn name(self) -> &'static str {
        match self {
            RatioFrom::Learned => "learned",
            RatioFrom::Setting => "setting",
            RatioFrom::Default => "default",
        }
    }

    /// The origin of a name ([`RatioFrom::name`]).
    pub fn from_name(name: &str) -> Option<RatioFrom> {
        [RatioFrom::Learned, RatioFrom::Setting, RatioFrom::Default].into_iter().find(|r| r.name() == name)
    }
}

/// What the guards took from a reference set ([`GuardConfig::learn_from`]), reported beside
/// their counts (`score`, `status`): the verdicts depend on it.
#[derive(Debug, Clone, PartialEq)]
pub struct GuardSetup {
    /// The length guard's expected hypothesis/source ratio of non-space characters.
    pub length_ratio: f64,
    /// Where it comes from.
    pub length_ratio_from: RatioFrom,
    /// Words of the language guard's vocabulary, or why it has none.
    pub vocabulary: Result<usize, String>,
}

/// True when `settings` set the expected length ratio (it is then not learned).
pub fn sets_length_ratio(settings: &[String]) -> bool {
    settings.iter().any(|s| s.split_once('=').is_some_and(|(k, _)| k.trim() == "length-ratio"))
}

impl GuardConfig {
    /// Learn what the guards take from a reference set, once the settings are applied: the
    /// expected length ratio from its (source, reference) pairs, unless `ratio_set` or their
    /// sources hold fewer than `length_min_chars` non-space characters, and the language
    /// vocabulary from its references ([`GuardConfig::learn_vocabulary`]). The daemon's
    /// sessions and `score` both learn here.
    pub fn learn_from<'a>(&mut self, pairs: impl IntoIterator<Item = (&'a str, &'a str)>, references: &[&str], ratio_set: bool) -> GuardSetup {
        let length_ratio_from = if ratio_set {
            RatioFrom::Setting
        } else {
            let mut tally = LengthTally::default();
            for (source, reference) in pairs {
                tally.add(source, reference);
            }
            match tally.ratio(self.length_min_chars) {
                Some(r) => {
                    self.length_ratio = r;
                    RatioFrom::Learned
                }
                None => RatioFrom::Default,
            }
        };
        let vocabulary = self.learn_vocabulary(references).map_err(str::to_owned);
        GuardSetup { length_ratio: self.length_ratio, length_ratio_from, vocabulary }
    }
}

/// Non-space characters of `text`.
pub fn char_len(text: &str) -> u64 {
    text.chars().filter(|&c| !is_space(c)).count() as u64
}

/// Reusable buffers of [`check`].
#[derive(Debug, Default, Clone)]
pub struct GuardScratch {
    hyp_chars: Vec<u32>,
    src_chars: Vec<u32>,
    hyp_pos: Vec<u32>,
    src_pos: Vec<u32>,
    ids: Vec<u64>,
    spans: scan::WordSpans,
    keys: Vec<u64>,
    /// Counts of character and character-pair buckets, all zero between uses.
    buckets: Vec<u32>,
}

/// Buckets of the copy guard's bound: unigram buckets, then bigram buckets (powers of two).
const UNIGRAM_BUCKETS: usize = 1 << 10;
const BIGRAM_BUCKETS: usize = 1 << 12;

fn unigram_bucket(c: u32) -> usize {
    (c.wrapping_mul(0x9E37_79B1) >> 22) as usize
}

fn bigram_bucket(a: u32, b: u32) -> usize {
    UNIGRAM_BUCKETS + ((a.wrapping_mul(0x9E37_79B1) ^ b).wrapping_mul(0x85EB_CA6B) >> 20) as usize
}

/// Upper bounds of the clipped character unigram and bigram matches of `hyp` against `src`:
/// counts summed per hash bucket (a collision can only add matches). Leaves the buckets zero.
fn bucket_matches(hyp: &[u32], src: &[u32], buckets: &mut Vec<u32>) -> (u64, u64) {
    if buckets.len() != UNIGRAM_BUCKETS + BIGRAM_BUCKETS {
        *buckets = vec![0; UNIGRAM_BUCKETS + BIGRAM_BUCKETS];
    }
    for (i, &c) in src.iter().enumerate() {
        buckets[unigram_bucket(c)] += 1;
        if let Some(&d) = src.get(i + 1) {
            buckets[bigram_bucket(c, d)] += 1;
        }
    }
    let (mut m1, mut m2) = (0u64, 0u64);
    let take = |b: &mut u32| {
        let hit = *b > 0;
        *b -= u32::from(hit);
        u64::from(hit)
    };
    for (i, &c) in hyp.iter().enumerate() {
        m1 += take(&mut buckets[unigram_bucket(c)]);
        if let Some(&d) = hyp.get(i + 1) {
            m2 += take(&mut buckets[bigram_bucket(c, d)]);
        }
    }
    for (i, &c) in src.iter().enumerate() {
        buckets[unigram_bucket(c)] = 0;
        if let Some(&d) = src.get(i + 1) {
            buckets[bigram_bucket(c, d)] = 0;
        }
    }
    (m1, m2)
}

#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum Outcome {
    Pass,
    Flag,
    Undecided,
}

fn flag_if(b: bool) -> Outcome {
    if b {
        Outcome::Flag
    } else {
        Outcome::Pass
    }
}

/// Run every guard on one (source, hypothesis) pair: [`check_with`] of the source's facts.
pub fn check(cfg: &GuardConfig, source: &str, hyp: &str, s: &mut GuardScratch) -> Verdict {
    check_with(cfg, &SourceFacts::of(source), source, hyp, s)
}

/// Run every guard on one (source, hypothesis) pair whose source's [`SourceFacts`] are known
/// (a session keeps them per reference segment).
///
/// One pass over the hypothesis ([`scan_hypothesis`]) gathers what the cheap guards need
/// (non-space characters, letters by script, its character pairs probed in the source's
/// presence set, its words and how many the vocabulary knows); the copy chrF, the source's
/// repetition and the language identifiers run only when a cheap bound or screen cannot decide.
pub fn check_with(cfg: &GuardConfig, src: &SourceFacts, source: &str, hyp: &str, s: &mut GuardScratch) -> Verdict {
    let scripts = cfg.target.map(|t| t.scripts).unwrap_or(&[]);
    let vocab = cfg.vocabulary.as_deref().filter(|_| cfg.vocab_share.is_some());
    let h = scan_hypothesis(hyp, scripts, &src.presence, vocab, &mut s.ids, &mut s.spans);
    let mut v = Verdict::default();
    v.set(Guard::Empty, flag_if(!h.alnum));
    v.set(Guard::Copy, copy_scanned(cfg, source, hyp, &h, src, s));
    v.set(Guard::Length, length_of(cfg, src.chars, h.chars));
    v.set(Guard::Repetition, repetition_scanned(cfg, source, s));
    let script = script_of_counts(cfg, h.letters, h.expected);
    v.set(Guard::Script, script);
    let known = vocab.map(|_| (h.known, h.lettered));
    v.set(Guard::Language, language_outcome(cfg, hyp, h.letters, script == Outcome::Flag, known));
    v
}

/// The copy guard on a scanned hypothesis and its source's facts; the same verdict as
/// [`copy`]. The characters are written out only when the presence bound cannot decide.
fn copy_scanned(cfg: &GuardConfig, source: &str, hyp: &str, h: &HypScan, src: &SourceFacts, s: &mut GuardScratch) -> Outcome {
    if !src.alnum {
        return Outcome::Undecided;
    }
    if h.alnum_lower == src.alnum_lower && alnum_lower(source).eq(alnum_lower(hyp)) {
        return Outcome::Flag;
    }
    let n = cfg.copy_order.clamp(1, MAX_CHRF_CHAR_ORDER);
    let (hl, sl) = (h.lower, src.lower);
    if hl == 0 || presence_surely_below(n, hl, sl, h.hits, cfg.copy_min_chrf) || presence_bound_of(n, hl, sl, h.hits) < cfg.copy_min_chrf {
        return Outcome::Pass;
    }
    fill_chars(hyp, n, &mut s.hyp_chars);
    fill_chars(source, n, &mut s.src_chars);
    if copy_bound(n, hl, sl, s) < cfg.copy_min_chrf {
        return Outcome::Pass;
    }
    flag_if(copy_chrf(n, hl, sl, s) >= cfg.copy_min_chrf)
}

/// The repetition guard with the hypothesis' words already in `s.ids`; the same verdict as
/// [`repetition`].
fn repetition_scanned(cfg: &GuardConfig, source: &str, s: &mut GuardScratch) -> Outcome {
    let n = cfg.repeat_order.clamp(1, MAX_REPEAT_ORDER);
    let (top, run) = repeats_of_ids(&s.ids, n, cfg.repeat_count, &mut s.keys);
    judge_repeats(cfg, n, (top, run), source, s)
}

/// The repetition verdict from the hypothesis' top n-gram count and longest run: flagged only
/// for repetition the source does not have itself.
fn judge_repeats(cfg: &GuardConfig, n: usize, (top, run): (usize, usize), source: &str, s: &mut GuardScratch) -> Outcome {
    let by_gram = top >= cfg.repeat_count;
    let by_run = run >= cfg.repeat_run;
    if !by_gram && !by_run {
        return Outcome::Pass;
    }
    let (src_top, src_run) = repeats(source, n, s);
    flag_if((by_gram && top > src_top) || (by_run && run > src_run))
}

fn length_of(cfg: &GuardConfig, src: u64, hyp: u64) -> Outcome {
    if src < cfg.length_min_chars as u64 {
        return Outcome::Undecided;
    }
    let rel = hyp as f64 / src as f64 / cfg.length_ratio;
    flag_if(rel < cfg.length_low || rel > cfg.length_high)
}

fn script_of_counts(cfg: &GuardConfig, letters: usize, expected: usize) -> Outcome {
    if cfg.target.is_none() || letters == 0 {
        return Outcome::Undecided;
    }
    flag_if((expected as f64) < cfg.script_min_share * letters as f64)
}

/// The guards one by one, each reading its text itself: the definition [`check`] is tested
/// against (and the shape the rules are documented in).
#[cfg(test)]
fn check_by_guard(cfg: &GuardConfig, source: &str, hyp: &str, s: &mut GuardScratch) -> Verdict {
    let mut v = Verdict::default();
    v.set(Guard::Empty, flag_if(!hyp.chars().any(char::is_alphanumeric)));
    v.set(Guard::Copy, copy(cfg, source, hyp, s));
    v.set(Guard::Length, length(cfg, source, hyp));
    v.set(Guard::Repetition, repetition(cfg, source, hyp, s));
    let (letters, expected) = script_counts(cfg, hyp);
    let script = script_of_counts(cfg, letters, expected);
    v.set(Guard::Script, script);
    v.set(Guard::Language, language_outcome(cfg, hyp, letters, script == Outcome::Flag, vocabulary_counts(cfg, hyp)));
    v
}

/// Lowercased letters and digits of `text` as code points (what "equal after normalisation" compares).
fn alnum_lower(text: &str) -> impl Iterator<Item = char> + '_ {
    text.chars().filter(|c| c.is_alphanumeric()).flat_map(char::to_lowercase)
}

#[cfg(test)]
fn copy(cfg: &GuardConfig, source: &str, hyp: &str, s: &mut GuardScratch) -> Outcome {
    if !source.chars().any(char::is_alphanumeric) {
        return Outcome::Undecided;
    }
    if alnum_lower(source).eq(alnum_lower(hyp)) {
        return Outcome::Flag;
    }
    let n = cfg.copy_order.clamp(1, MAX_CHRF_CHAR_ORDER);
    let (hl, sl) = (fill_chars(hyp, n, &mut s.hyp_chars), fill_chars(source, n, &mut s.src_chars));
    if hl == 0 || copy_bound(n, hl, sl, s) < cfg.copy_min_chrf {
        return Outcome::Pass;
    }
    flag_if(copy_chrf(n, hl, sl, s) >= cfg.copy_min_chrf)
}

/// The lowercased non-space characters of `text` into `out` as code points shifted by one (0
/// is the padding, smaller than any character), followed by `n` padding items; their number.
fn fill_chars(text: &str, n: usize, out: &mut Vec<u32>) -> usize {
    out.clear();
    for c in text.chars().filter(|&c| !is_space(c)) {
        if c.is_ascii() {
            out.push(c.to_ascii_lowercase() as u32 + 1);
        } else {
            out.extend(c.to_lowercase().map(|l| l as u32 + 1));
        }
    }
    let len = out.len();
    out.extend(std::iter::repeat_n(0, n));
    len
}

/// [`presence_bound_of`] of two filled texts (their bigrams hashed here).
#[cfg(test)]
fn presence_bound(n: usize, hyp: &[u32], src: &[u32]) -> f64 {
    presence_bound_of(n, hyp.len(), src.len(), presence_hits(hyp, src))
}

/// The hypothesis bigrams of two filled texts whose class pair the source has, by definition.
#[cfg(test)]
fn presence_hits(hyp: &[u32], src: &[u32]) -> u64 {
    // One bit per ordered pair of classes, by the pair's number a * 32 + b.
    let mut set = [0u64; PRESENCE_BITS / 64];
    let class = |x: u32| scan::class_of(char::from_u32(x - 1).expect("a filled character"));
    let pair = |a: u32, b: u32| (class(a) * 32 + class(b)) as usize;
    for w in src.windows(2) {
        let k = pair(w[0], w[1]);
        set[k / 64] |= 1 << (k % 64);
    }
    hyp.windows(2).map(|w| pair(w[0], w[1])).map(|k| (set[k / 64] >> (k % 64)) & 1).sum()
}

/// A quick sufficient condition for [`presence_bound_of`] below `min`: with every order of both
/// texts defined (each at least `n` characters), every precision and recall of an order from
/// 2 is at most `hits` over the fewest n-grams of order `n`, order 1's at most 1; chrF, a
/// weighted harmonic mean of the mean precision and the mean recall, is at most the larger.
fn presence_surely_below(n: usize, hl: usize, sl: usize, hits: u64, min: f64) -> bool {
    if n < 2 || hl < n || sl < n {
        return false;
    }
    // 100 * (1 + (n - 1) * min(hits / fewest, 1)) / n < min, multiplied out (no division).
    let fewest = (hl.min(sl) - n + 1) as u64;
    let scaled = 100 * (fewest + (n as u64 - 1) * hits.min(fewest));
    (scaled as f64) < min * (n as u64 * fewest) as f64
}

/// An upper bound of [`copy_chrf`] cheaper than [`copy_bound`], with no table to clear and
/// nothing written per character: the source's character bigrams set bits of a set of
/// [`PRESENCE_BITS`] bits (one per pair of character classes, [`scan::class_of`]), and the
/// `hits`, the hypothesis bigrams whose bit is set, bound its
/// clipped bigram matches (a clipped match is a hypothesis occurrence of a bigram the source
/// has; a collision only adds); the matches of orders n >= 2 are at most the bigram matches,
/// those of order 1 at most the shorter text (as in [`copy_bound`]); chrF grows with the
/// matches. `hl` and `sl`: the texts' lowercased non-space characters.
fn presence_bound_of(n: usize, hl: usize, sl: usize, hits: u64) -> f64 {
    let mut bound = OrderCounts::default();
    for order in 1..=n {
        let (h, r) = (ngram_count(hl, order), ngram_count(sl, order));
        bound.matches[order - 1] = if order == 1 { h.min(r) } else { hits.min(h).min(r) };
        bound.hyp[order - 1] = h;
        bound.reference[order - 1] = r;
    }
    ChrfStats { char: bound, word: OrderCounts::default() }.score(n, 0, DEFAULT_CHRF_BETA).score
}

/// An upper bound of [`copy_chrf`], cheap: the matches of every order n >= 2 are at most the
/// bigram matches (each matched n-gram starts with a matched bigram), those of order 1 the
/// unigram matches, both bounded by bucket counts; chrF grows with the matches.
fn copy_bound(n: usize, hl: usize, sl: usize, s: &mut GuardScratch) -> f64 {
    let (m1, m2) = bucket_matches(&s.hyp_chars[..hl], &s.src_chars[..sl], &mut s.buckets);
    let mut bound = OrderCounts::default();
    for order in 1..=n {
        let (h, r) = (ngram_count(hl, order), ngram_count(sl, order));
        bound.matches[order - 1] = (if order == 1 { m1 } else { m2 }).min(h).min(r);
        bound.hyp[order - 1] = h;
        bound.reference[order - 1] = r;
    }
    ChrfStats { char: bound, word: OrderCounts::default() }.score(n, 0, DEFAULT_CHRF_BETA).score
}

/// chrF (orders 1..=n, [`DEFAULT_CHRF_BETA`]) of the filled hypothesis against the filled source.
fn copy_chrf(n: usize, hl: usize, sl: usize, s: &mut GuardScratch) -> f64 {
    sort_positions(&s.hyp_chars, hl, n, &mut s.hyp_pos);
    sort_positions(&s.src_chars, sl, n, &mut s.src_pos);
    let mut c = OrderCounts::default();
    for order in 1..=n {
        c.matches[order - 1] = clipped_matches(order, &s.hyp_chars, &s.hyp_pos, &s.src_chars, &s.src_pos);
        c.hyp[order - 1] = ngram_count(hl, order);
        c.reference[order - 1] = ngram_count(sl, order);
    }
    ChrfStats { char: c, word: OrderCounts::default() }.score(n, 0, DEFAULT_CHRF_BETA).score
}

#[cfg(test)]
fn length(cfg: &GuardConfig, source: &str, hyp: &str) -> Outcome {
    let src = char_len(source);
    if src < cfg.length_min_chars as u64 {
        return Outcome::Undecided;
    }
    let rel = char_len(hyp) as f64 / src as f64 / cfg.length_ratio;
    flag_if(rel < cfg.length_low || rel > cfg.length_high)
}

/// True for the characters of a word: letters, marks and digits (CJK ideographs and kana are
/// words of their own, see [`word_ids`]).
fn is_word_char(c: char) -> bool {
    if c.is_ascii() {
        return c.is_ascii_alphanumeric();
    }
    c.is_alphanumeric() || matches!(get_general_category(c), GeneralCategory::NonspacingMark | GeneralCategory::SpacingMark | GeneralCategory::EnclosingMark)
}

/// The words of `text` as 64-bit hashes of their lowercased characters ([`scan::word_id`]), each with whether it
/// has a letter (`char::is_alphabetic`), to `f`: maximal runs of [`is_word_char`] characters,
/// each CJK ideograph or kana ([`crate::text::is_cjk`]) a word of its own; white space,
/// punctuation and symbols separate words and are not words. A hash collision (about 2^-64
/// per pair of distinct words) could only merge two words.
pub(crate) fn for_each_word(text: &str, mut f: impl FnMut(u64, bool)) {
    let (mut start, mut letter) = (None, false);
    for (i, c) in text.char_indices() {
        let cjk = !c.is_ascii() && crate::text::is_cjk(c);
        if cjk || !is_word_char(c) {
            if let Some(a) = start.take() {
                f(scan::word_id(&text[a..i]), letter);
                letter = false;
            }
            if cjk && c.is_alphabetic() {
                f(scan::word_id(&text[i..i + c.len_utf8()]), true);
            }
            continue;
        }
        start.get_or_insert(i);
        letter |= c.is_alphabetic();
    }
    if let Some(a) = start {
        f(scan::word_id(&text[a..]), letter);
    }
}

/// The words of `text` ([`for_each_word`]) into `ids`.
fn word_ids(text: &str, ids: &mut Vec<u64>) {
    ids.clear();
    for_each_word(text, |id, _| ids.push(id));
}

/// (count of the most frequent word n-gram of order `n`, longest run of one word) of `text`.
fn repeats(text: &str, n: usize, s: &mut GuardScratch) -> (usize, usize) {
    word_ids(text, &mut s.ids);
    repeats_of_ids(&s.ids, n, 0, &mut s.keys)
}

/// True when some of 256 slots (by a key's top byte, remixed) gets `at_least` of `keys`: false
/// means no key occurs that often.
fn slot_reaches(keys: &[u64], at_least: usize) -> bool {
    let mut slots = [0u8; 256];
    let cap = at_least.min(255) as u8;
    let mut reached = false;
    for &k in keys {
        let c = &mut slots[(k.wrapping_mul(0x9E37_79B9_7F4A_7C15) >> 56) as usize];
        *c = c.saturating_add(1);
        reached |= *c >= cap;
    }
    reached
}

/// [`repeats`] of the words `ids`, except that a top count below `at_least` may be given as 0.
fn repeats_of_ids(ids: &[u64], n: usize, at_least: usize, keys: &mut Vec<u64>) -> (usize, usize) {
    let len = ids.len();
    let mut run = 0usize;
    let mut longest = 0usize;
    for i in 0..len {
        run = if i > 0 && ids[i] == ids[i - 1] { run + 1 } else { 1 };
        longest = longest.max(run);
    }
    if len < n {
        return (0, longest);
    }
    // Counted first in 256 slots by their top byte: no slot reaching `at_least` means no key
    // does (equal keys share a slot). Words first: an n-gram occurring `at_least` times has its
    // first word occurring as often.
    if at_least > 1 && !slot_reaches(ids, at_least) {
        return (0, longest);
    }
    // One 64-bit key per n-gram (a collision, about 2^-64 per pair, could only merge two
    // n-grams); sorted, the longest run of equal keys is the top count.
    keys.clear();
    keys.extend(ids.windows(n).map(|w| w.iter().fold(0u64, |k, &id| (k.rotate_left(17) ^ id).wrapping_mul(0x9E37_79B9_7F4A_7C15))));
    if at_least > 1 && !slot_reaches(keys, at_least) {
        return (0, longest);
    }
    keys.sort_unstable();
    let (mut top, mut count) = (0usize, 0usize);
    for (i, &k) in keys.iter().enumerate() {
        count = if i > 0 && keys[i - 1] == k { count + 1 } else { 1 };
        top = top.max(count);
    }
    (top, longest)
}

#[cfg(test)]
fn repetition(cfg: &GuardConfig, source: &str, hyp: &str, s: &mut GuardScratch) -> Outcome {
    let n = cfg.repeat_order.clamp(1, MAX_REPEAT_ORDER);
    let (top, run) = repeats(hyp, n, s);
    judge_repeats(cfg, n, (top, run), source, s)
}

/// The letters of `text` and how many of them are in the target's scripts.
fn script_counts(cfg: &GuardConfig, text: &str) -> (usize, usize) {
    let (mut letters, mut expected) = (0usize, 0usize);
    let scripts = cfg.target.map(|t| t.scripts).unwrap_or(&[]);
    for c in text.chars() {
        if let Some(sc) = script_of(c) {
            letters += 1;
            expected += usize::from(scripts.contains(&sc));
        }
    }
    (letters, expected)
}

/// The language guard's verdict on `hyp` (with `letters` letters; `wrong_script` when the
/// script guard flagged it); `known`: (words the vocabulary knows, words with a letter) when
/// the session has a vocabulary.
fn language_outcome(cfg: &GuardConfig, hyp: &str, letters: usize, wrong_script: bool, known: Option<(usize, usize)>) -> Outcome {
    let Some(target) = cfg.target else { return Outcome::Undecided };
    let Some(want) = target.ident else { return Outcome::Undecided };
    if letters < cfg.language_min_letters {
        return Outcome::Undecided;
    }
    if wrong_script {
        return Outcome::Flag;
    }
    if target.own_script {
        return Outcome::Pass;
    }
    if !cfg.language_id {
        return Outcome::Undecided;
    }
    // The vocabulary screen, then the fast identifier, pass what they take for the target; the
    // rest goes to the thorough identifier, which flags only when it is sure of another language.
    if let (Some((known, lettered)), Some(share)) = (known, cfg.vocab_share) {
        if lettered > 0 && known as f64 >= share * lettered as f64 {
            return Outcome::Pass;
        }
    }
    if target.screen.is_some_and(|quick| whichlang::detect_language(hyp) == quick) {
        return Outcome::Pass;
    }
    match whatlang::detect(hyp) {
        Some(info) if info.is_reliable() => flag_if(info.lang() != want),
        _ => Outcome::Undecided,
    }
}

/// The vocabulary counts of `hyp`: (words `cfg`'s vocabulary knows, words with a letter), None
/// without a vocabulary.
#[cfg(test)]
fn vocabulary_counts(cfg: &GuardConfig, hyp: &str) -> Option<(usize, usize)> {
    let v = cfg.vocabulary.as_deref().filter(|_| cfg.vocab_share.is_some())?;
    let (mut known, mut lettered) = (0usize, 0usize);
    for_each_word(hyp, |id, letter| {
        if letter {
            lettered += 1;
            known += usize::from(v.contains(id));
        }
    });
    Some((known, lettered))
}

#[cfg(test)]
mod tests;
