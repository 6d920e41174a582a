//! Sessions: one thing being watched, bound to one reference-set version and one scoring
//! configuration, with cumulative statistics and a window over the most recent segments.
//!
//! Pure and synchronous like the scoring core: the server owns sessions and calls in here.

pub mod external_history;
pub mod history;
mod replicates;
mod window;

use std::collections::{BTreeMap, HashMap};
use std::sync::{Arc, Mutex, MutexGuard};

use unicode_normalization::UnicodeNormalization;

use crate::guard::{GuardConfig, GuardCounts, GuardScratch, GuardSetup, Verdict};
use crate::metric::resample::{segment_key, Replicates, Resampling};
use crate::metric::{CorpusStats, ScoreConfig, SegmentStats};
use crate::refs::compiled::{Compiled, Scratch};
use crate::refs::{RefSet, SegmentInput};
use crate::text::{is_space, push_lowercased};

pub use replicates::{checkpoint_spacing, ReplicateCopy, SavedReplicates, SessionReplicates, REPLICATE_SAVE_RECORDS};
pub use window::{segment_code, Window, NO_SEGMENT};

/// Size of the `recent` window in segments unless the session sets one.
pub const DEFAULT_WINDOW: usize = 1000;
/// Largest `recent` window a session may ask for.
pub const MAX_WINDOW: usize = 1_000_000;
/// Longest session or reference-set name.
pub const MAX_NAME_LEN: usize = 64;
/// Most labels a session may carry.
pub const MAX_LABELS: usize = 16;
/// Longest label value.
pub const MAX_LABEL_VALUE_LEN: usize = 256;
/// Label names a session may not use: the server sets them itself.
const RESERVED_LABELS: &[&str] = &["session", "refset", "digest", "config", "resampling", "replicate", "metric", "window", "outcome", "order", "kind", "version"];

/// Why a name or label is not acceptable.
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
pub enum NameError {
    /// Empty, too long, or bad characters.
    #[error("{what} '{name}' is not valid: use 1 to {MAX_NAME_LEN} characters of A-Z a-z 0-9 . _ -, starting with a letter or digit")]
    BadName {
        /// "session name" or "reference set name".
        what: &'static str,
        /// The name as given (escaped for display).
        name: String,
    },
    /// A label name that is not a Prometheus label name, or reserved.
    #[error("label name '{0}' is not valid: use [a-zA-Z_][a-zA-Z0-9_]*, not starting with '__', and none of {RESERVED_LABELS:?}")]
    BadLabel(String),
    /// A label value that is too long.
    #[error("the value of label '{0}' is longer than {MAX_LABEL_VALUE_LEN} bytes")]
    LabelTooLong(String),
    /// Too many labels.
    #[error("{0} labels given; at most {MAX_LABELS}")]
    TooManyLabels(usize),
}

/// Check a session or reference-set name (it becomes a Prometheus label value and a key).
pub fn check_name(what: &'static str, name: &str) -> Result<(), NameError> {
    let ok = !name.is_empty()
        && name.len() <= MAX_NAME_LEN
        && name.as_bytes()[0].is_ascii_alphanumeric()
        && name.bytes().all(|b| b.is_ascii_alphanumeric() || matches!(b, b'.' | b'_' | b'-'));
    if ok {
        Ok(())
    } else {
        Err(NameError::BadName { what, name: name.escape_debug().take(80).collect() })
    }
}

/// Check session labels against Prometheus label-name rules and the limits.
pub fn check_labels(labels: &BTreeMap<String, String>) -> Result<(), NameError> {
    if labels.len() > MAX_LABELS {
        return Err(NameError::TooManyLabels(labels.len()));
    }
    for (k, v) in labels {
        let valid = k.bytes().enumerate().all(|(i, b)| b == b'_' || b.is_ascii_alphabetic() || (i > 0 && b.is_ascii_digit()));
        if k.is_empty() || !valid || k.starts_with("__") || RESERVED_LABELS.contains(&k.as_str()) {
            return Err(NameError::BadLabel(k.escape_debug().take(80).collect()));
        }
        if v.len() > MAX_LABEL_VALUE_LEN {
            return Err(NameError::LabelTooLong(k.clone()));
        }
    }
    Ok(())
}

/// The normalised form of a source text used for lookup: Unicode NFC, white space collapsed to
/// single spaces and trimmed, lowercased when the session is caseless.
pub fn normalize_source(text: &str, caseless: bool) -> String {
    let nfc: String = text.nfc().collect();
    let mut lowered = String::with_capacity(nfc.len());
    push_lowercased(&nfc, caseless, &mut lowered);
    let mut out = String::with_capacity(lowered.len());
    for w in lowered.split(is_space).filter(|w| !w.is_empty()) {
        if !out.is_empty() {
            out.push(' ');
        }
        out.push_str(w);
    }
    out
}

/// The guards' configuration of a session: defaults, the declared target, the settings, and
/// what it learns from the reference set ([`GuardConfig::learn_from`]): the expected length
/// ratio from the segments that have a source (each reference against its source) unless a
/// setting gives it, and the target vocabulary from the references when it can be used.
fn guard_config(spec: &SessionSpec, refs: &RefSet) -> (GuardConfig, GuardSetup) {
    let mut c = GuardConfig { target: spec.target_language.as_deref().and_then(crate::guard::language), ..GuardConfig::default() };
    for s in &spec.guard_settings {
        // Checked at creation ([`check_guard_settings`]); a stored one that no longer parses
        // keeps its default.
        let _ = c.set(s);
    }
    let pairs = refs.segments().filter_map(|seg| seg.source().map(|src| seg.refs().map(move |r| (src, r)))).flatten();
    let references: Vec<&str> = refs.segments().flat_map(|s| s.refs()).collect();
    let setup = c.learn_from(pairs, &references, crate::guard::sets_length_ratio(&spec.guard_settings));
    (c, setup)
}

/// Check guard settings (and the target language code) of a session definition.
pub fn check_guard_settings(target_language: Option<&str>, settings: &[String]) -> Result<(), crate::guard::GuardError> {
    let mut c = GuardConfig::default();
    if let Some(code) = target_language {
        c = c.with_target(code)?;
    }
    settings.iter().try_for_each(|s| c.set(s))
}

/// Lookup of live traffic by source text. Segments whose normalised sources are equal become
/// one multi-reference entry (the union of their references), compiled like any reference set.
pub struct SourceIndex {
    /// Normalised source -> index of its entry in the merged set.
    map: HashMap<String, u32>,
    /// The merged set, compiled for the session's configuration: entry `i` carries the id of
    /// the first segment with that source and the references of all of them.
    compiled: Compiled,
}

impl SourceIndex {
    fn build(refs: &RefSet, config: ScoreConfig) -> Option<SourceIndex> {
        let mut map: HashMap<String, u32> = HashMap::new();
        let mut merged: Vec<SegmentInput> = Vec::new();
        for seg in refs.segments() {
            let Some(src) = seg.source() else { continue };
            let key = normalize_source(src, config.caseless);
            match map.get(&key) {
                Some(&i) => merged[i as usize].refs.extend(seg.refs().map(str::to_owned)),
                None => {
                    map.insert(key, merged.len() as u32);
                    merged.push(SegmentInput { id: seg.id().to_owned(), source: Some(src.to_owned()), refs: seg.refs().map(str::to_owned).collect() });
                }
            }
        }
        if merged.is_empty() {
            return None;
        }
        // Ids stay unique (each entry keeps its first segment's id), so this cannot fail.
        let set = RefSet::new(merged).ok()?;
        Some(SourceIndex { map, compiled: Compiled::build(Arc::new(set), config) })
    }

    /// Number of distinct normalised sources.
    pub fn len(&self) -> usize {
        self.map.len()
    }

    /// True when no segment has a source.
    pub fn is_empty(&self) -> bool {
        self.map.is_empty()
    }
}

/// What a session was created with.
#[derive(Debug, Clone)]
pub struct SessionSpec {
    /// Session name.
    pub name: String,
    /// Name of the reference set.
    pub refset: String,
    /// Scoring configuration (validated).
    pub config: ScoreConfig,
    /// Free-form labels.
    pub labels: BTreeMap<String, String>,
    /// `recent` window size in segments.
    pub window: usize,
    /// Bootstrap replicates for intervals.
    pub resampling: Resampling,
    /// Declared target language (ISO 639-1 code of [`crate::guard::LANGUAGES`]) for the
    /// script and language guards; None: undeclared (those guards are undecided).
    pub target_language: Option<String>,
    /// Guard thresholds as `KEY=VALUE` ([`GuardConfig::set`]), applied after the learned length
    /// ratio (so a `length-ratio` setting wins); validated when the session is created.
    pub guard_settings: Vec<String>,
    /// External segment metrics its items may carry (validated when the session is created).
    pub external: crate::external::Declaration,
}

/// How one item of a batch came out.
// Nearly every outcome is `Scored`: boxing its statistics would allocate once per item.
#[allow(clippy::large_enum_variant)]
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Outcome {
    /// Scored against segment `index` (of the set, or of the source index when `by_source`).
    Scored {
        /// The segment's statistics.
        stats: SegmentStats,
        /// Matched by source text (live traffic) rather than by id.
        by_source: bool,
        /// Index of the segment (in the set, or in the source index when `by_source`).
        index: u32,
    },
    /// No segment with that id or source.
    Unknown,
}

/// The key an item names its segment by.
#[derive(Debug, Clone, Copy)]
pub enum ItemKey<'a> {
    /// A segment id of the reference set.
    Id(&'a str),
    /// A source text (live traffic).
    Source(&'a str),
}

/// Counters of a session, all additive.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq, serde::Serialize, serde::Deserialize)]
pub struct Counts {
    /// Items scored.
    pub scored: u64,
    /// Items that named no segment.
    pub unknown: u64,
    /// Items rejected as invalid.
    pub rejected: u64,
    /// Verdicts of the reference-free guards on the items that carried a source (absent in
    /// stores written before the guards: zeros).
    #[serde(default)]
    pub guards: GuardCounts,
}

/// Mutable statistics of a session, behind one short lock.
#[derive(Debug)]
pub struct SessionState {
    /// Everything scored since creation or the last reset.
    pub cumulative: CorpusStats,
    /// The most recent segments.
    pub window: Window,
    /// Outcome counters.
    pub counts: Counts,
    /// Highest applied sequence per producer (exactly-once batches).
    pub producers: HashMap<String, u64>,
    /// Bootstrap replicate sums (None: the session keeps none).
    pub replicates: Option<SessionReplicates>,
}

/// A live session.
pub struct Session {
    spec: SessionSpec,
    compiled: Compiled,
    sources: Option<SourceIndex>,
    /// Replicate keys ([`segment_key`] of the id) of the set's segments and of the source
    /// index's entries.
    keys: Vec<u64>,
    source_keys: Vec<u64>,
    /// The guards' thresholds: the declared target, the settings, and what they learned from
    /// the reference set.
    guards: GuardConfig,
    /// What the guards took from the reference set (for `status`).
    guard_setup: GuardSetup,
    /// What the guards need of each segment's source, by segment index (empty when no segment
    /// has a source; a segment without one has default facts, never read).
    source_facts: Vec<crate::guard::SourceFacts>,
    /// The segment index in the set of each source index entry's first segment.
    source_segment: Vec<u32>,
    created_unix: i64,
    /// Held only to add a batch's statistics or to read a snapshot, never across an await or
    /// while scoring: a std mutex is right for such short sections.
    state: Mutex<SessionState>,
    /// Time buckets of the statistics; its own short lock, taken after `state` is released.
    history: Mutex<history::History>,
    /// Time buckets of the external metrics' sums (kept across a reset, as `history`).
    external_history: Mutex<external_history::ExternalHistory>,
    /// External metric statistics; its own short lock, taken after `state` is released.
    external: Mutex<ExternalStats>,
}

/// A session's external metric statistics: since creation or reset, and over the `recent`
/// window of items ([`crate::external::window`]).
#[derive(Debug)]
struct ExternalStats {
    cumulative: crate::external::ExternalState,
    recent: crate::external::window::ExternalWindow,
}

impl ExternalStats {
    fn new(spec: &SessionSpec, next_id: u64) -> ExternalStats {
        let (metrics, resampling) = (spec.external.len(), external_resampling(spec));
        ExternalStats { cumulative: crate::external::ExternalState::new(metrics, resampling), recent: crate::external::window::ExternalWindow::new(spec.window, metrics, resampling, next_id) }
    }
}

/// What one batch adds to the durable copy of the external `recent` window: its items as rows
/// ([`crate::external::window::encode_item`]) with consecutive ids from `first_id`.
#[derive(Debug, Clone, Default, PartialEq, Eq)]
pub struct ExternalRows {
    /// Id of the first item.
    pub first_id: u64,
    /// Items.
    pub items: u64,
    /// Their rows, one after the other.
    pub values: Vec<u64>,
}

impl Session {
    /// Create a session over `refs` (the reference-set version it keeps for its lifetime).
    pub fn new(spec: SessionSpec, refs: Arc<RefSet>, created_unix: i64) -> Session {
        let sources = SourceIndex::build(&refs, spec.config);
        let (guards, guard_setup) = guard_config(&spec, &refs);
        let compiled = Compiled::build(refs, spec.config);
        let keys_of = |set: &RefSet| set.segments().map(|s| segment_key(s.id().as_bytes())).collect::<Vec<u64>>();
        let keys = keys_of(compiled.refs());
        let source_keys = sources.as_ref().map_or_else(Vec::new, |ix| keys_of(ix.compiled.refs()));
        let set = compiled.refs();
        let source_facts = if sources.is_some() { set.segments().map(|s| s.source().map(crate::guard::SourceFacts::of).unwrap_or_default()).collect() } else { Vec::new() };
        // Each entry carries its first segment's id (ids are unique in the set).
        let source_segment = sources.as_ref().map_or_else(Vec::new, |ix| ix.compiled.refs().segments().map(|e| set.find(e.id()).map_or(u32::MAX, |i| i as u32)).collect());
        let replicates = (spec.resampling.resamples > 0).then(|| SessionReplicates::new(&spec.config, spec.resampling, spec.window, 0));
        let state = SessionState { cumulative: CorpusStats::default(), window: Window::new(spec.window, &spec.config), counts: Counts::default(), producers: HashMap::new(), replicates };
        let history = history::History::new(history::HistoryConfig::default(), &spec.config, (spec.resampling.resamples > 0).then(|| Replicates::new(&spec.config, spec.resampling.resamples, spec.resampling.seed)));
        let external = Mutex::new(ExternalStats::new(&spec, 0));
        let external_history = Mutex::new(external_history::ExternalHistory::new(history::HistoryConfig::default(), spec.external.len()));
        Session { spec, compiled, sources, keys, source_keys, guards, guard_setup, source_facts, source_segment, created_unix, state: Mutex::new(state), history: Mutex::new(history), external, external_history }
    }

    /// The external values a batch adds (CPU work, no lock taken): `items` are (weight key,
    /// checked values).
    pub fn external_delta(&self, items: &[(u64, crate::external::ItemValues)]) -> Result<crate::external::ExternalDelta, crate::external::SumError> {
        crate::external::ExternalDelta::of(self.spec.external.len(), external_resampling(&self.spec), items)
    }

    fn external_stats(&self) -> MutexGuard<'_, ExternalStats> {
        // As for `state`: integers, whole after any panic that matters.
        self.external.lock().unwrap_or_else(|e| e.into_inner())
    }

    /// Add a batch's external values (after the batch was applied, not a duplicate) to the
    /// cumulative sums and the `recent` window; the rows the window's durable copy gains.
    /// Nothing changes on error (sums that would overflow).
    pub fn apply_external(&self, d: &crate::external::ExternalDelta) -> Result<ExternalRows, crate::external::SumError> {
        let mut ext = self.external_stats();
        let mut cumulative = ext.cumulative.clone();
        cumulative.add(d)?;
        let first_id = ext.recent.next_id();
        ext.recent.add(&d.items, d.replicates.as_ref())?;
        ext.cumulative = cumulative;
        drop(ext);
        let mut values = Vec::with_capacity(d.items.len() * 4);
        d.items.iter().for_each(|(k, v)| crate::external::window::encode_item(*k, v, &mut values));
        Ok(ExternalRows { first_id, items: d.items.len() as u64, values })
    }

    /// Replace the external statistics with a durable copy (at startup): the cumulative sums,
    /// and the `recent` window's items (oldest first) with the id the next item gets.
    pub fn restore_external(&self, copy: crate::external::ExternalState, recent: Vec<(u64, crate::external::ItemValues)>, next_id: u64) -> Result<(), String> {
        let (metrics, resampling) = (self.spec.external.len(), external_resampling(&self.spec));
        if !copy.fits(metrics, resampling) {
            return Err("the stored external sums do not fit the session's external metrics or resampling".into());
        }
        let recent = crate::external::window::ExternalWindow::restore(self.spec.window, metrics, resampling, recent, next_id).map_err(|e| format!("external window: {e}"))?;
        *self.external_stats() = ExternalStats { cumulative: copy, recent };
        Ok(())
    }

    /// A copy of the cumulative external statistics.
    pub fn external(&self) -> crate::external::ExternalState {
        self.external_stats().cumulative.clone()
    }

    /// A copy of the cumulative external sums alone (no replicate sums).
    pub fn external_totals(&self) -> crate::external::ExternalTotals {
        self.external_stats().cumulative.totals.clone()
    }

    /// The durable copy of the external statistics: the cumulative ones, and the ids of the
    /// `recent` window's items (first, next).
    pub fn external_durable(&self) -> (crate::external::ExternalState, (u64, u64)) {
        let ext = self.external_stats();
        (ext.cumulative.clone(), (ext.recent.first_id(), ext.recent.next_id()))
    }

    /// The external sums of the `recent` window, and its replicate sums (None: the session
    /// keeps none).
    pub fn external_recent(&self) -> (crate::external::ExternalTotals, Option<crate::external::replicates::ExternalReplicates>) {
        let ext = self.external_stats();
        (ext.recent.totals().clone(), ext.recent.replicates().cloned())
    }

    /// Per key, the latest fixed-point value of external metric `m` in the `recent` window,
    /// keys in the order they first appear.
    pub fn external_recent_by_key(&self, m: usize) -> Vec<(u64, i64)> {
        // One pass under the lock; the keys are matched up outside it.
        let values = self.external_stats().recent.values_of(m);
        crate::external::window::latest_by_key(values)
    }

    /// The guards' configuration of this session.
    pub fn guard_config(&self) -> &GuardConfig {
        &self.guards
    }

    /// What the guards took from the reference set: the expected length ratio and where it
    /// comes from, the language vocabulary's words or why there is none.
    pub fn guard_setup(&self) -> &GuardSetup {
        &self.guard_setup
    }

    /// The guards' verdict on one item (CPU work, no lock taken) that [`Session::score_item`]
    /// gave `outcome`: items that carry a source (live traffic, matched or not) or name a
    /// segment that has one; None for the others. A matched segment's source is not read again
    /// (its [`crate::guard::SourceFacts`] are kept) when the item's source is that text.
    pub fn guard_item(&self, key: ItemKey<'_>, outcome: &Outcome, hyp: &str, scratch: &mut GuardScratch) -> Option<Verdict> {
        let set = self.compiled.refs();
        let segment = match (key, outcome) {
            (ItemKey::Id(_), Outcome::Scored { by_source: false, index, .. }) => Some(*index as usize),
            (ItemKey::Id(_), _) => None,
            (ItemKey::Source(_), Outcome::Scored { by_source: true, index, .. }) => self.source_segment.get(*index as usize).map(|&i| i as usize),
            (ItemKey::Source(_), _) => None,
        };
        let known = segment.and_then(|i| Some((set.segment(i).source()?, self.source_facts.get(i)?)));
        match (key, known) {
            (ItemKey::Id(_), Some((source, facts))) => Some(crate::guard::check_with(&self.guards, facts, source, hyp, scratch)),
            (ItemKey::Id(_), None) => None,
            (ItemKey::Source(src), Some((source, facts))) if src == source => Some(crate::guard::check_with(&self.guards, facts, source, hyp, scratch)),
            (ItemKey::Source(src), _) => Some(crate::guard::check(&self.guards, src, hyp, scratch)),
        }
    }

    /// The replicate key of the segment a window record names by its [`segment_code`].
    pub fn key_of(&self, code: u64) -> Option<u64> {
        let keys = if code & 1 == 1 { &self.source_keys } else { &self.keys };
        keys.get(usize::try_from(code >> 1).ok()?).copied()
    }

    /// The replicate sums a batch's scored items add (CPU work, no lock taken); None when the
    /// session keeps no replicates.
    pub fn replicate_delta(&self, outcomes: &[Outcome]) -> Option<Replicates> {
        let r = self.spec.resampling;
        (r.resamples > 0).then(|| {
            let mut d = Replicates::new(&self.spec.config, r.resamples, r.seed);
            for o in outcomes {
                if let Outcome::Scored { stats, by_source, index } = o {
                    let key = if *by_source { self.source_keys[*index as usize] } else { self.keys[*index as usize] };
                    d.add(key, stats);
                }
            }
            d
        })
    }

    /// Apply a batch (see [`SessionState::apply`]); `delta` is its [`Session::replicate_delta`],
    /// computed here when not given.
    pub fn apply(&self, producer: &str, sequence: u64, outcomes: &[Outcome], rejected: u64, delta: Option<&Replicates>) -> Option<Applied> {
        self.apply_guarded(producer, sequence, outcomes, rejected, delta, &GuardCounts::default())
    }

    /// `delta`, or the batch's replicate sums computed here into `own` when the caller has none.
    fn delta_for<'a>(&self, delta: Option<&'a Replicates>, outcomes: &[Outcome], own: &'a mut Option<Replicates>) -> Option<&'a Replicates> {
        if delta.is_some() {
            return delta;
        }
        *own = self.replicate_delta(outcomes);
        own.as_ref()
    }

    /// [`Session::apply`] with the guard counts of the batch's items.
    pub fn apply_guarded(&self, producer: &str, sequence: u64, outcomes: &[Outcome], rejected: u64, delta: Option<&Replicates>, guards: &GuardCounts) -> Option<Applied> {
        let mut own = None;
        let delta = self.delta_for(delta, outcomes, &mut own);
        self.state().apply(producer, sequence, outcomes, rejected, delta, guards)
    }

    /// [`Session::apply`] at time `now` (seconds since the Unix epoch): the batch is also
    /// counted in the history's buckets of that time, and the effect says what of the history
    /// the store is to write.
    pub fn apply_at(&self, now: i64, producer: &str, sequence: u64, outcomes: &[Outcome], rejected: u64, delta: Option<&Replicates>, guards: &GuardCounts) -> Option<Applied> {
        let mut own = None;
        let delta = self.delta_for(delta, outcomes, &mut own);
        let mut applied = self.apply_guarded(producer, sequence, outcomes, rejected, delta, guards)?;
        applied.history = Some(self.history().record(now, &applied.added, &applied.batch, delta));
        Some(applied)
    }

    /// Lock the history (short sections only: copy what a query needs).
    pub fn history(&self) -> MutexGuard<'_, history::History> {
        // As for `state`: the buckets are integers, whole after any panic that matters.
        self.history.lock().unwrap_or_else(|e| e.into_inner())
    }

    /// Set the spans of the history and of the external metrics' history.
    pub fn set_history_config(&self, config: history::HistoryConfig) {
        self.history().set_config(config);
        self.external_history().set_config(config);
    }

    /// Lock the external metrics' history (short sections only).
    pub fn external_history(&self) -> MutexGuard<'_, external_history::ExternalHistory> {
        // As for `history`: integers, whole after any panic that matters.
        self.external_history.lock().unwrap_or_else(|e| e.into_inner())
    }

    /// Count a batch's external sums (applied with [`Session::apply_external`]) in the
    /// external metrics' buckets of time `now`; what the store is to write.
    pub fn record_external(&self, now: i64, added: &crate::external::ExternalTotals) -> Result<external_history::ExternalHistoryWrite, crate::external::SumError> {
        self.external_history().record(now, added)
    }

    /// Replace the external metrics' history with one rebuilt from a store, under `config`.
    pub fn restore_external_history(&self, config: history::HistoryConfig, stored: Vec<external_history::StoredExternalBucket>) -> Result<(), String> {
        *self.external_history() = external_history::ExternalHistory::restore(config, self.spec.external.len(), stored)?;
        Ok(())
    }

    /// Replace the history with one rebuilt from a store, under `config`.
    pub fn restore_history(&self, config: history::HistoryConfig, stored: Vec<history::StoredBucket>) -> Result<(), String> {
        let template = (self.spec.resampling.resamples > 0).then(|| Replicates::new(&self.spec.config, self.spec.resampling.resamples, self.spec.resampling.seed));
        *self.history() = history::History::restore(config, &self.spec.config, template, stored)?;
        Ok(())
    }

    /// The segments of the `recent` window, keyed by their replicate key, oldest first; a
    /// segment scored more than once counts with its latest record. Records kept before
    /// windows named their segment are left out.
    pub fn recent_segments(&self) -> Vec<(u64, SegmentStats)> {
        let layout = crate::metric::layout::Layout::new(&self.spec.config);
        let records: Vec<Vec<u64>> = {
            let st = self.state();
            st.window.records(0, u64::MAX).map(<[u64]>::to_vec).collect()
        };
        let fields = layout.width();
        let mut latest: HashMap<u64, usize> = HashMap::new();
        let mut out: Vec<(u64, SegmentStats)> = Vec::new();
        for rec in &records {
            let Some(key) = rec.get(fields).filter(|&&c| c != NO_SEGMENT).and_then(|&c| self.key_of(c)) else { continue };
            let stats = layout.decode(&rec[..fields]);
            match latest.get(&key) {
                Some(&i) => out[i].1 = stats,
                None => {
                    latest.insert(key, out.len());
                    out.push((key, stats));
                }
            }
        }
        out
    }

    /// The `recent` window read at one moment: its statistics, its replicate sums, and the
    /// replicate keys of its records, sorted; None when the session keeps no replicates or a
    /// record names no segment (restored from a store written before records did).
    pub fn recent_with_keys(&self) -> Option<(CorpusStats, Replicates, Vec<u64>)> {
        let fields = crate::metric::layout::Layout::new(&self.spec.config).width();
        let (stats, copy, codes) = {
            let st = self.state();
            let copy = st.replicates.as_ref()?.copy(&st.window);
            let codes: Vec<u64> = st.window.records(0, u64::MAX).map(|r| r.get(fields).copied().unwrap_or(NO_SEGMENT)).collect();
            (st.window.stats(), copy, codes)
        };
        let mut keys = codes.into_iter().map(|c| if c == NO_SEGMENT { None } else { self.key_of(c) }).collect::<Option<Vec<u64>>>()?;
        keys.sort_unstable();
        let recent = copy.recent(|c| self.key_of(c))?;
        Some((stats, recent, keys))
    }

    /// The cumulative statistics and (when complete) replicate sums, read together.
    pub fn cumulative_with_replicates(&self) -> (CorpusStats, Option<Replicates>) {
        let st = self.state();
        (st.cumulative, st.replicates.as_ref().and_then(SessionReplicates::cumulative))
    }

    /// The cumulative replicate sums now, when complete.
    pub fn cumulative_replicates(&self) -> Option<Replicates> {
        let st = self.state();
        st.replicates.as_ref().and_then(SessionReplicates::cumulative)
    }

    /// The cumulative and recent replicate sums now (each None when not available: no
    /// replicates, or statistics from before the session kept them). The window's sums are
    /// derived outside the lock from a short copy.
    pub fn replicates(&self) -> (Option<Replicates>, Option<Replicates>) {
        let copy = {
            let st = self.state();
            match &st.replicates {
                Some(r) => r.copy(&st.window),
                None => return (None, None),
            }
        };
        let recent = copy.recent(|c| self.key_of(c));
        (copy.cumulative, recent)
    }

    /// The definition.
    pub fn spec(&self) -> &SessionSpec {
        &self.spec
    }

    /// The reference set version this session scores against.
    pub fn refs(&self) -> &Arc<RefSet> {
        self.compiled.refs()
    }

    /// Creation time, seconds since the Unix epoch.
    pub fn created_unix(&self) -> i64 {
        self.created_unix
    }

    /// Distinct normalised sources available for lookup (0 when the set has no sources).
    pub fn source_entries(&self) -> usize {
        self.sources.as_ref().map_or(0, SourceIndex::len)
    }

    /// Heap bytes of the compiled tables of this session.
    pub fn memory_bytes(&self) -> usize {
        let sources = self.sources.as_ref().map_or(0, |s| s.compiled.memory_bytes() + s.compiled.refs().memory_bytes() + s.map.capacity() * 48 + s.map.keys().map(String::len).sum::<usize>());
        let st = self.state();
        let replicates = st.replicates.as_ref().map_or(0, SessionReplicates::memory_bytes);
        let window = st.window.memory_bytes();
        drop(st);
        let history = self.history().memory_bytes();
        let external = self.external_stats().recent.memory_bytes() + self.external_history().memory_bytes();
        let guards = self.source_facts.capacity() * std::mem::size_of::<crate::guard::SourceFacts>() + self.source_segment.capacity() * 4 + self.guards.vocabulary.as_ref().map_or(0, |v| v.memory_bytes());
        self.compiled.memory_bytes() + sources + (self.keys.capacity() + self.source_keys.capacity()) * 8 + window + replicates + history + external + guards
    }

    /// Score one item (CPU work, no lock taken).
    pub fn score_item(&self, key: ItemKey<'_>, hyp: &str, scratch: &mut Scratch) -> Outcome {
        match key {
            ItemKey::Id(id) => match self.compiled.refs().find(id) {
                Some(i) => Outcome::Scored { stats: self.compiled.score_segment(i, hyp, scratch), by_source: false, index: i as u32 },
                None => Outcome::Unknown,
            },
            ItemKey::Source(src) => {
                let Some(ix) = &self.sources else { return Outcome::Unknown };
                match ix.map.get(&normalize_source(src, self.spec.config.caseless)) {
                    Some(&i) => Outcome::Scored { stats: ix.compiled.score_segment(i as usize, hyp, scratch), by_source: true, index: i },
                    None => Outcome::Unknown,
                }
            }
        }
    }

    /// The id of a scored segment (the first merged segment's id for a source entry).
    pub fn segment_id(&self, by_source: bool, index: u32) -> &str {
        let set = match (&self.sources, by_source) {
            (Some(ix), true) => ix.compiled.refs(),
            _ => self.compiled.refs(),
        };
        set.segment(index as usize).id()
    }

    /// Lock the statistics (short sections only).
    pub fn state(&self) -> MutexGuard<'_, SessionState> {
        // A panic while holding this lock cannot leave the integers half-updated in a way that
        // matters more than losing the process; keep serving the data.
        self.state.lock().unwrap_or_else(|e| e.into_inner())
    }

    /// Replace the statistics with a durable copy (at startup).
    pub fn restore(&self, state: SessionState) {
        *self.state() = state;
    }

    /// Zero the statistics and counters (producer sequence marks are kept, so a retried old
    /// batch is still recognised).
    pub fn reset(&self) {
        let mut st = self.state();
        st.cumulative = CorpusStats::default();
        st.window.clear();
        st.counts = Counts::default();
        let next = st.window.next_id();
        if let Some(r) = &mut st.replicates {
            r.reset(next);
        }
        drop(st);
        let mut ext = self.external_stats();
        let next = ext.recent.next_id();
        *ext = ExternalStats::new(&self.spec, next);
    }
}

/// The replicate settings of a session's external metrics (None: it keeps no replicates).
fn external_resampling(spec: &SessionSpec) -> Option<(usize, u64)> {
    (spec.resampling.resamples > 0).then_some((spec.resampling.resamples, spec.resampling.seed))
}

impl SessionState {
    /// Whether a batch (producer, sequence) was already applied. Sequence 0 or an empty
    /// producer opts out of duplicate detection.
    pub fn is_duplicate(&self, producer: &str, sequence: u64) -> bool {
        !producer.is_empty() && sequence > 0 && self.producers.get(producer).is_some_and(|&s| sequence <= s)
    }

    /// Apply the outcomes of one batch, with `delta` the replicate sums of its scored items
    /// (needed when the session keeps replicates). Returns None (and changes nothing) for a
    /// duplicate, else its whole effect: what it added, and the totals after it.
    /// `guards`: the guard counts of the batch's items.
    pub fn apply(&mut self, producer: &str, sequence: u64, outcomes: &[Outcome], rejected: u64, delta: Option<&Replicates>, guards: &GuardCounts) -> Option<Applied> {
        if self.is_duplicate(producer, sequence) {
            return None;
        }
        let mark = (!producer.is_empty() && sequence > 0).then(|| {
            self.producers.insert(producer.to_owned(), sequence);
            (producer.to_owned(), sequence)
        });
        let first_row = self.window.next_id();
        let mut rows = Vec::new();
        let mut added = CorpusStats::default();
        let mut batch = Counts { rejected, guards: *guards, ..Counts::default() };
        for o in outcomes {
            match o {
                Outcome::Scored { stats, by_source, index } => {
                    added.add_segment(stats);
                    rows.extend_from_slice(self.window.push(stats, segment_code(*by_source, *index)));
                    batch.scored += 1;
                }
                Outcome::Unknown => batch.unknown += 1,
            }
        }
        self.cumulative += added;
        self.counts.add(&batch);
        let (mut save_replicates, mut keep_from) = (None, self.window.first_id());
        if let Some(r) = &mut self.replicates {
            match delta {
                Some(d) => save_replicates = r.add_batch(d, &self.window),
                None => debug_assert!(false, "a session with replicates applies a batch without them"),
            }
            keep_from = keep_from.min(r.saved_to());
        }
        Some(Applied { mark, first_row, rows, added, batch, cumulative: self.cumulative, recent: self.window.stats(), counts: self.counts, next_row: self.window.next_id(), save_replicates, keep_from, history: None, external: None, external_window: None, external_rows: None, external_history: None })
    }
}

impl Counts {
    /// Add another set of counters.
    pub fn add(&mut self, o: &Counts) {
        self.scored += o.scored;
        self.unknown += o.unknown;
        self.rejected += o.rejected;
        self.guards += o.guards;
    }
}

/// The whole effect of one applied batch on a session: what the acknowledgement, the
/// telemetry and the durable copy need, computed once under the session's lock.
#[derive(Debug, Clone, Default)]
pub struct Applied {
    /// The producer's new sequence mark.
    pub mark: Option<(String, u64)>,
    /// Id of the first window record the batch added (one per scored item, ids consecutive).
    pub first_row: u64,
    /// The window records the batch added, one after the other.
    pub rows: Vec<u64>,
    /// Statistics the batch added.
    pub added: CorpusStats,
    /// The batch's own outcome counts.
    pub batch: Counts,
    /// Cumulative statistics after the batch.
    pub cumulative: CorpusStats,
    /// Statistics of the recent window after the batch.
    pub recent: CorpusStats,
    /// Counters after the batch.
    pub counts: Counts,
    /// The window's next row id after the batch.
    pub next_row: u64,
    /// A durable copy of the cumulative replicate sums, when one is due.
    pub save_replicates: Option<SavedReplicates>,
    /// Oldest window record a durable copy must keep: the window's first, or an older one
    /// that the last saved replicate sums do not cover yet.
    pub keep_from: u64,
    /// What the batch changed in the history ([`Session::apply_at`]; None from
    /// [`Session::apply`]).
    pub history: Option<history::HistoryWrite>,
    /// The session's external statistics after the batch, for its durable copy (None: the
    /// session declares no external metric, or [`Session::apply`]).
    pub external: Option<crate::external::ExternalState>,
    /// The ids of the external `recent` window's items after the batch (first, next), with
    /// `external`.
    pub external_window: Option<(u64, u64)>,
    /// The items the batch added to the external `recent` window.
    pub external_rows: Option<ExternalRows>,
    /// What the batch's external values changed in the external metrics' history.
    pub external_history: Option<external_history::ExternalHistoryWrite>,
}

#[cfg(test)]
mod tests {
    use super::*;

    fn set() -> Arc<RefSet> {
        let seg = |id: &str, src: &str, refs: &[&str]| SegmentInput { id: id.into(), source: Some(src.into()), refs: refs.iter().map(|r| r.to_string()).collect() };
        Arc::new(
            RefSet::new(vec![
                seg("1", "The ferry leaves at nine.", &["Die Fähre fährt um neun ab."]),
                seg("2", "Please  keep your ticket.", &["Bitte behalten Sie Ihr Ticket."]),
                seg("3", "the ferry leaves at nine.", &["Die Fähre legt um neun ab."]),
            ])
            .unwrap(),
        )
    }

    fn spec(caseless: bool) -> SessionSpec {
        let config = ScoreConfig { caseless, ..Default::default() };
        SessionSpec { name: "s".into(), refset: "r".into(), config, labels: BTreeMap::new(), window: 2, resampling: Resampling::default(), target_language: None, guard_settings: Vec::new(), external: Default::default() }
    }

    #[test]
    fn names_and_labels() {
        assert!(check_name("session name", "model-v7.en-de_probe").is_ok());
        for bad in ["", "-x", "a b", "a\"b", "a\nb", &"x".repeat(65), "ü"] {
            assert!(check_name("session name", bad).is_err(), "{bad:?}");
        }
        let ok: BTreeMap<String, String> = [("model".to_string(), "v7".to_string())].into();
        assert!(check_labels(&ok).is_ok());
        for bad in ["", "1a", "a-b", "__x", "session"] {
            let l: BTreeMap<String, String> = [(bad.to_string(), "v".to_string())].into();
            assert!(check_labels(&l).is_err(), "{bad:?}");
        }
    }

    #[test]
    fn source_normalisation() {
        assert_eq!(normalize_source("  A\u{0301}b \t c\u{2003}", false), "\u{00C1}b c");
        assert_eq!(normalize_source("Ferry LEAVES", true), "ferry leaves");
    }

    #[test]
    fn duplicate_sources_merge_into_one_multi_reference_entry() {
        let cased = Session::new(spec(false), set(), 0);
        assert_eq!(cased.source_entries(), 3);
        let lower = Session::new(spec(true), set(), 0);
        assert_eq!(lower.source_entries(), 2);
        let mut scratch = Scratch::default();
        // The hypothesis equals the second reference of the merged entry: BLEU statistics as for
        // an identical reference (closest length 7 tokens with the nist tokenizer).
        match lower.score_item(ItemKey::Source("THE ferry leaves   at nine."), "Die Fähre legt um neun ab.", &mut scratch) {
            Outcome::Scored { stats, by_source: true, index } => {
                assert_eq!(stats.bleu.matches[..4], stats.bleu.totals[..4]);
                assert_eq!(lower.segment_id(true, index), "1");
            }
            other => panic!("{other:?}"),
        }
        assert_eq!(lower.score_item(ItemKey::Source("no such sentence"), "x", &mut scratch), Outcome::Unknown);
        assert_eq!(lower.score_item(ItemKey::Id("9"), "x", &mut scratch), Outcome::Unknown);
    }

    #[test]
    fn counts_stored_before_the_guards_still_load() {
        let old: Counts = serde_json::from_str(r#"{"scored":3,"unknown":1,"rejected":2}"#).unwrap();
        assert_eq!(old, Counts { scored: 3, unknown: 1, rejected: 2, guards: GuardCounts::default() });
    }

    #[test]
    fn guard_counts_apply_once_and_reset() {
        let s = Session::new(SessionSpec { target_language: Some("de".into()), ..spec(false) }, set(), 0);
        assert_eq!(s.guard_config().target.map(|t| t.code), Some("de"));
        let mut g = GuardScratch::default();
        // By id (the segment has a source), by an unknown source, and an unknown id (no source).
        let verdicts: Vec<Option<Verdict>> = [(ItemKey::Id("1"), ""), (ItemKey::Source("Nothing like it."), "Nothing like it."), (ItemKey::Id("9"), "x")]
            .into_iter()
            .map(|(k, h)| s.guard_item(k, &s.score_item(k, h, &mut Scratch::default()), h, &mut g))
            .collect();
        assert!(verdicts[0].is_some_and(|v| v.is_flagged(crate::guard::Guard::Empty)));
        assert!(verdicts[1].is_some_and(|v| v.is_flagged(crate::guard::Guard::Copy)));
        assert_eq!(verdicts[2], None);
        let mut batch = GuardCounts::default();
        verdicts.iter().flatten().for_each(|&v| batch.add(v));
        assert!(s.apply_guarded("p", 1, &[Outcome::Unknown], 0, None, &batch).is_some_and(|a| a.batch.guards == batch && a.counts.guards == batch));
        assert!(s.apply_guarded("p", 1, &[Outcome::Unknown], 0, None, &batch).is_none(), "a duplicate adds nothing");
        assert_eq!(s.state().counts.guards.checked, 2);
        s.reset();
        assert_eq!(s.state().counts.guards, GuardCounts::default());
    }

    #[test]
    fn apply_counts_once_per_producer_sequence() {
        let s = Session::new(spec(false), set(), 0);
        let mut scratch = Scratch::default();
        let o = s.score_item(ItemKey::Id("2"), "Bitte behalten Sie Ihr Ticket.", &mut scratch);
        assert!(s.apply("p1", 1, &[o, Outcome::Unknown], 1, None).is_some());
        assert!(s.apply("p1", 1, &[o], 0, None).is_none(), "same sequence again is a duplicate");
        assert!(s.apply("p2", 1, &[o], 0, None).is_some(), "another producer has its own sequence");
        assert!(s.apply("", 0, &[o], 0, None).is_some() && s.apply("", 0, &[o], 0, None).is_some(), "anonymous batches are not deduplicated");
        let st = s.state();
        assert_eq!(st.counts, Counts { scored: 4, unknown: 1, rejected: 1, guards: GuardCounts::default() });
        assert_eq!(st.cumulative.segments, 4);
        assert_eq!(st.window.stats().segments, 2, "window of 2");
    }
}
