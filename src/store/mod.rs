//! Durable state in an embedded ACID store (redb): reference-set versions (their canonical
//! encoding, so a restart rebuilds everything without the original files), reference-set names,
//! session definitions, cumulative statistics and counters, the `recent` window rows, copies of
//! the bootstrap replicate sums, and the per-producer sequence marks that make batches count
//! exactly once.
//!
//! Synchronous: the server calls it from blocking threads. One process opens a store at a time.

mod history;

use std::collections::{BTreeMap, HashMap};
use std::path::{Path, PathBuf};

use redb::{Database, ReadableDatabase, ReadableTable, ReadableTableMetadata, TableDefinition};
use serde::{Deserialize, Serialize};

use crate::metric::resample::Resampling;
use crate::metric::{CorpusStats, ScoreConfig};
use crate::refs::RefSet;
use crate::session::{Applied, Counts, SavedReplicates, SessionSpec};

/// File name of the store inside `--data-dir`.
pub const STORE_FILE: &str = "mtgauge.redb";
/// Data directory unless configured (the conventional place of a service's state).
pub const DEFAULT_DATA_DIR: &str = "/var/lib/mtgauge";
/// Version of the layout below; bump on any incompatible change (and upgrade the older one in
/// [`Store::open`] where possible).
pub const SCHEMA_VERSION: u64 = 3;
/// The first layout: one stored row per window record (upgraded to blocks on open).
const SCHEMA_ROWS: u64 = 1;
/// Window blocks without replicate copies (upgraded on open: its sessions get intervals of
/// their `recent` window once it has turned over, and of the cumulative statistics after a
/// reset).
const SCHEMA_BLOCKS: u64 = 2;

const META: TableDefinition<&str, u64> = TableDefinition::new("meta");
/// Reference-set digest (hex) -> canonical encoding.
const VERSIONS: TableDefinition<&str, &[u8]> = TableDefinition::new("refset_versions");
/// Reference-set name -> digest (hex) of its current version.
const NAMES: TableDefinition<&str, &str> = TableDefinition::new("refset_names");
/// Session name -> JSON of [`StoredSession`].
const SESSIONS: TableDefinition<&str, &[u8]> = TableDefinition::new("sessions");
/// Session name -> JSON of [`StoredStats`].
const STATS: TableDefinition<&str, &[u8]> = TableDefinition::new("session_stats");
/// Schema 1 only: (session, record id) -> one window record (little-endian u64 values).
const WINDOW_ROWS: TableDefinition<(&str, u64), &[u8]> = TableDefinition::new("window_rows");
/// (session, id of its first record) -> a block of consecutive window records: the number of
/// records, then every value, as LEB128 varints. One block per session per group commit; a
/// block goes when all its records have left the window.
const WINDOW: TableDefinition<(&str, u64), &[u8]> = TableDefinition::new("window_blocks");
/// (session, id of its first item) -> a block of consecutive items of the external `recent`
/// window ([`crate::external::window::encode_item`]): the number of items, then every value, as
/// LEB128 varints. One block per session per group commit; a block goes when all its items have
/// left the window.
const EXTERNAL_WINDOW: TableDefinition<(&str, u64), &[u8]> = TableDefinition::new("external_window_blocks");
/// Session name -> a copy of its cumulative bootstrap replicate sums, as LEB128 varints: the
/// record id it covers up to (exclusive), 1 when it covers every segment since creation or
/// reset (else 0), then the sums (none: all zero). Window records after the covered id are
/// kept until a newer copy covers them.
const REPLICATES: TableDefinition<&str, &[u8]> = TableDefinition::new("replicate_sums");
/// (session, producer) -> highest applied sequence.
const MARKS: TableDefinition<(&str, &str), u64> = TableDefinition::new("producer_marks");

/// Why the store cannot be used.
#[derive(Debug, thiserror::Error)]
pub enum StoreError {
    /// Another process has it open.
    #[error("store {0} is in use by another process (one `mtgauge serve` per --data-dir)")]
    InUse(PathBuf),
    /// The directory cannot be created or used.
    #[error("data directory {path}: {source}")]
    Dir {
        /// The directory.
        path: PathBuf,
        /// The error.
        source: std::io::Error,
    },
    /// Written by an incompatible version.
    #[error("store {path} has schema version {found}; this mtgauge reads version {SCHEMA_VERSION} ({hint})")]
    Schema {
        /// The file.
        path: PathBuf,
        /// Its version.
        found: u64,
        /// What to do.
        hint: &'static str,
    },
    /// Damaged or unreadable content.
    #[error("store {path} is damaged or unreadable: {message}")]
    Corrupt {
        /// The file.
        path: PathBuf,
        /// What is wrong.
        message: String,
    },
}

#[derive(Debug, Serialize, Deserialize)]
struct StoredSession {
    name: String,
    refset: String,
    refset_digest: String,
    config: ScoreConfig,
    labels: BTreeMap<String, String>,
    window: usize,
    created_unix: i64,
    /// Absent in sessions stored before intervals: the daemon's defaults.
    #[serde(default)]
    resampling: Resampling,
    /// Absent in sessions stored before the guards: undeclared.
    #[serde(default)]
    target_language: Option<String>,
    /// Absent in sessions stored before the guards: none.
    #[serde(default)]
    guard_settings: Vec<String>,
    /// Absent in sessions stored before external metrics: none.
    #[serde(default)]
    external: crate::external::Declaration,
}

#[derive(Debug, Default, Serialize, Deserialize)]
struct StoredStats {
    cumulative: CorpusStats,
    counts: Counts,
    next_row: u64,
    /// External metric sums (absent: the session declares none, or none counted since
    /// creation or reset).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    external: Option<crate::external::ExternalState>,
    /// Ids of the external `recent` window's items (first, next); absent: empty (or stored
    /// before the window kept external values).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    external_window: Option<(u64, u64)>,
}

/// One session as read back.
#[derive(Debug)]
pub struct LoadedSession {
    /// Its definition.
    pub spec: SessionSpec,
    /// Digest of its reference-set version (a key of [`Snapshot::versions`]).
    pub refset_digest: String,
    /// Creation time.
    pub created_unix: i64,
    /// Statistics.
    pub cumulative: CorpusStats,
    /// Counters.
    pub counts: Counts,
    /// Window records from id `records_from` to `next_row` (exclusive), oldest first: the
    /// window's, and older ones the replicate copy does not cover yet.
    pub records: Vec<Vec<u64>>,
    /// Id of the first of `records`.
    pub records_from: u64,
    /// Records of the window: the last `window_len` of `records`.
    pub window_len: usize,
    /// The copy of the cumulative replicate sums (None: stored before sessions kept them).
    pub replicates: Option<SavedReplicates>,
    /// Next window row id.
    pub next_row: u64,
    /// Sequence marks.
    pub marks: HashMap<String, u64>,
    /// History buckets (none in a store written before histories).
    pub history: Vec<crate::session::history::StoredBucket>,
    /// External metrics' history buckets (none in a store written before them).
    pub external_history: Vec<crate::session::external_history::StoredExternalBucket>,
    /// External metric sums (None: none stored).
    pub external: Option<crate::external::ExternalState>,
    /// The external `recent` window's items, oldest first.
    pub external_recent: Vec<(u64, crate::external::ItemValues)>,
    /// Id the next item of the external `recent` window gets.
    pub external_next: u64,
}

/// Everything needed to rebuild the server state.
#[derive(Debug, Default)]
pub struct Snapshot {
    /// Reference-set versions by digest.
    pub versions: HashMap<String, RefSet>,
    /// Reference-set names and the digest of their current version.
    pub names: BTreeMap<String, String>,
    /// Sessions.
    pub sessions: Vec<LoadedSession>,
}

/// The effect of one applied batch, to be written in a group commit.
#[derive(Debug, Clone, Copy)]
pub struct BatchWrite<'a> {
    /// Session name.
    pub session: &'a str,
    /// What changed.
    pub applied: &'a Applied,
}

/// An open store.
pub struct Store {
    db: Database,
    path: PathBuf,
}

/// Append `v` as an LEB128 varint.
fn put_varint(out: &mut Vec<u8>, mut v: u64) {
    while v >= 0x80 {
        out.push(v as u8 | 0x80);
        v >>= 7;
    }
    out.push(v as u8);
}

/// Read one LEB128 varint.
fn get_varint(b: &mut &[u8]) -> Option<u64> {
    let mut v = 0u64;
    for shift in (0..64).step_by(7) {
        let (&byte, rest) = b.split_first()?;
        *b = rest;
        v |= u64::from(byte & 0x7f) << shift;
        if byte < 0x80 {
            return Some(v);
        }
    }
    None
}

/// A block of `n` records (their values one after the other).
fn encode_block(n: u64, values: &[u64]) -> Vec<u8> {
    let mut out = Vec::with_capacity(values.len() + 4);
    put_varint(&mut out, n);
    values.iter().for_each(|&v| put_varint(&mut out, v));
    out
}

/// The records of a block.
fn decode_block(b: &[u8]) -> Option<Vec<Vec<u64>>> {
    let (n, values) = decode_values(b)?;
    let n = n as usize;
    if n == 0 || values.len() % n != 0 {
        return None;
    }
    let width = values.len() / n;
    Some(values.chunks(width.max(1)).map(<[u64]>::to_vec).collect())
}

/// A copy of replicate sums.
fn encode_replicates(r: &SavedReplicates) -> Vec<u8> {
    let mut out = Vec::with_capacity(r.sums.len() * 3 + 12);
    put_varint(&mut out, r.covered_to);
    put_varint(&mut out, u64::from(r.complete));
    r.sums.iter().for_each(|&v| put_varint(&mut out, v));
    out
}

fn decode_replicates(b: &[u8]) -> Option<SavedReplicates> {
    let (covered_to, mut values) = decode_values(b)?;
    if values.is_empty() {
        return None;
    }
    let complete = values.remove(0) == 1;
    Some(SavedReplicates { covered_to, complete, sums: values })
}

/// A leading varint and the ones after it.
fn decode_values(mut b: &[u8]) -> Option<(u64, Vec<u64>)> {
    let first = get_varint(&mut b)?;
    let mut values = Vec::new();
    while !b.is_empty() {
        values.push(get_varint(&mut b)?);
    }
    Some((first, values))
}

/// New window records of one session within a group commit, as blocks of consecutive ids.
#[derive(Default)]
struct SessionBlocks<'a> {
    last: Option<&'a Applied>,
    /// The newest replicate copy due.
    replicates: Option<&'a SavedReplicates>,
    /// (first id, records, values).
    blocks: Vec<(u64, u64, Vec<u64>)>,
    /// External window items, likewise.
    external_blocks: Vec<(u64, u64, Vec<u64>)>,
    marks: Vec<(&'a str, u64)>,
}

impl Store {
    /// Open (or create) the store in `dir`.
    pub fn open(dir: &Path) -> Result<Store, StoreError> {
        std::fs::create_dir_all(dir).map_err(|source| StoreError::Dir { path: dir.to_owned(), source })?;
        let path = dir.join(STORE_FILE);
        let corrupt = |e: &dyn std::fmt::Display| StoreError::Corrupt { path: path.clone(), message: e.to_string() };
        let db = match Database::create(&path) {
            Ok(db) => db,
            Err(redb::DatabaseError::DatabaseAlreadyOpen) => return Err(StoreError::InUse(path)),
            Err(redb::DatabaseError::Storage(redb::StorageError::Io(e))) if e.kind() == std::io::ErrorKind::PermissionDenied => {
                return Err(StoreError::Dir { path: dir.to_owned(), source: e })
            }
            Err(e) => return Err(corrupt(&e)),
        };
        let store = Store { db, path };
        store.check_schema()?;
        Ok(store)
    }

    /// The store's file.
    pub fn path(&self) -> &Path {
        &self.path
    }

    fn err(&self, e: impl std::fmt::Display) -> StoreError {
        StoreError::Corrupt { path: self.path.clone(), message: e.to_string() }
    }

    fn check_schema(&self) -> Result<(), StoreError> {
        let txn = self.db.begin_write().map_err(|e| self.err(e))?;
        // Create every table, so that readers never meet a missing one.
        (|| -> Result<(), redb::Error> {
            txn.open_table(VERSIONS)?;
            txn.open_table(NAMES)?;
            txn.open_table(SESSIONS)?;
            txn.open_table(STATS)?;
            txn.open_table(WINDOW)?;
            txn.open_table(MARKS)?;
            txn.open_table(REPLICATES)?;
            // Added in the same schema version: a store without it has no external window yet.
            txn.open_table(EXTERNAL_WINDOW)?;
            txn.open_table(history::HISTORY)?;
            txn.open_table(history::HISTORY_SUMS)?;
            txn.open_table(history::HISTORY_EXTERNAL)?;
            Ok(())
        })()
        .map_err(|e| self.err(e))?;
        let found = {
            let mut meta = txn.open_table(META).map_err(|e| self.err(e))?;
            let found = meta.get("schema_version").map_err(|e| self.err(e))?.map(|v| v.value());
            if found.is_none() {
                let empty = txn.open_table(SESSIONS).map_err(|e| self.err(e))?.is_empty().map_err(|e| self.err(e))? && txn.open_table(NAMES).map_err(|e| self.err(e))?.is_empty().map_err(|e| self.err(e))?;
                if !empty {
                    return Err(self.err("no schema version recorded in a non-empty store"));
                }
                meta.insert("schema_version", SCHEMA_VERSION).map_err(|e| self.err(e))?;
            }
            found
        };
        if found == Some(SCHEMA_ROWS) {
            upgrade_rows_to_blocks(&txn).map_err(|e| self.err(format!("upgrading schema {SCHEMA_ROWS} to {SCHEMA_VERSION}: {e}")))?;
        }
        if found == Some(SCHEMA_ROWS) || found == Some(SCHEMA_BLOCKS) {
            // Schema 2 -> 3 adds the replicate table (created above); sessions without a copy
            // load with incomplete cumulative replicates.
            txn.open_table(META).map_err(|e| self.err(e))?.insert("schema_version", SCHEMA_VERSION).map_err(|e| self.err(e))?;
            return txn.commit().map_err(|e| self.err(e));
        }
        match found {
            None | Some(SCHEMA_VERSION) => txn.commit().map_err(|e| self.err(e)),
            Some(v) if v > SCHEMA_VERSION => Err(StoreError::Schema { path: self.path.clone(), found: v, hint: "written by a newer mtgauge; run that version or move the data dir aside" }),
            Some(v) => Err(StoreError::Schema { path: self.path.clone(), found: v, hint: "written by an older mtgauge with no upgrade path; move the data dir aside" }),
        }
    }

    /// Read everything back.
    pub fn load(&self) -> Result<Snapshot, StoreError> {
        let txn = self.db.begin_read().map_err(|e| self.err(e))?;
        let mut snap = Snapshot::default();
        for entry in txn.open_table(VERSIONS).map_err(|e| self.err(e))?.iter().map_err(|e| self.err(e))? {
            let (k, v) = entry.map_err(|e| self.err(e))?;
            let digest = parse_digest(k.value()).ok_or_else(|| self.err(format!("bad reference-set key {:?}", k.value())))?;
            let set = RefSet::decode(v.value(), Some(&digest)).map_err(|e| self.err(format!("reference set {}: {e}", k.value())))?;
            snap.versions.insert(k.value().to_owned(), set);
        }
        for entry in txn.open_table(NAMES).map_err(|e| self.err(e))?.iter().map_err(|e| self.err(e))? {
            let (k, v) = entry.map_err(|e| self.err(e))?;
            if !snap.versions.contains_key(v.value()) {
                return Err(self.err(format!("reference set {} points at a missing version", k.value())));
            }
            snap.names.insert(k.value().to_owned(), v.value().to_owned());
        }
        let stats = txn.open_table(STATS).map_err(|e| self.err(e))?;
        let window = txn.open_table(WINDOW).map_err(|e| self.err(e))?;
        let marks = txn.open_table(MARKS).map_err(|e| self.err(e))?;
        let replicates = txn.open_table(REPLICATES).map_err(|e| self.err(e))?;
        let external_window = txn.open_table(EXTERNAL_WINDOW).map_err(|e| self.err(e))?;
        let (h_stats, h_sums) = (txn.open_table(history::HISTORY).map_err(|e| self.err(e))?, txn.open_table(history::HISTORY_SUMS).map_err(|e| self.err(e))?);
        let h_external = txn.open_table(history::HISTORY_EXTERNAL).map_err(|e| self.err(e))?;
        for entry in txn.open_table(SESSIONS).map_err(|e| self.err(e))?.iter().map_err(|e| self.err(e))? {
            let (k, v) = entry.map_err(|e| self.err(e))?;
            let name = k.value();
            let s: StoredSession = serde_json::from_slice(v.value()).map_err(|e| self.err(format!("session {name}: {e}")))?;
            if !snap.versions.contains_key(&s.refset_digest) {
                return Err(self.err(format!("session {name} points at a missing reference-set version")));
            }
            let st: StoredStats = match stats.get(name).map_err(|e| self.err(e))? {
                Some(b) => serde_json::from_slice(b.value()).map_err(|e| self.err(format!("statistics of {name}: {e}")))?,
                None => StoredStats::default(),
            };
            // The window holds the last min(capacity, segments since reset) records, whose ids
            // end at next_row - 1; older records of the first block are skipped.
            let live = (st.cumulative.segments as usize).min(s.window.max(1)) as u64;
            let first_live = st.next_row.checked_sub(live).ok_or_else(|| self.err(format!("window of {name}: {live} records before record {}", st.next_row)))?;
            let saved = match replicates.get(name).map_err(|e| self.err(e))? {
                Some(b) => Some(decode_replicates(b.value()).ok_or_else(|| self.err(format!("replicate sums of {name} do not decode")))?),
                None => None,
            };
            let records_from = saved.as_ref().map_or(first_live, |r| r.covered_to.min(first_live));
            let mut rows = Vec::new();
            for r in window.range((name, 0)..=(name, u64::MAX)).map_err(|e| self.err(e))? {
                let (k, v) = r.map_err(|e| self.err(e))?;
                let first = k.value().1;
                let block = decode_block(v.value()).ok_or_else(|| self.err(format!("window block {first} of {name} does not decode")))?;
                for (i, row) in block.into_iter().enumerate() {
                    if first + i as u64 >= records_from {
                        rows.push(row);
                    }
                }
            }
            if rows.len() as u64 != st.next_row - records_from {
                return Err(self.err(format!("window of {name} has {} records from record {records_from}, expected {}", rows.len(), st.next_row - records_from)));
            }
            let mut m = HashMap::new();
            for r in marks.range((name, "")..).map_err(|e| self.err(e))? {
                let (k, v) = r.map_err(|e| self.err(e))?;
                let (s_name, producer) = k.value();
                if s_name != name {
                    break;
                }
                m.insert(producer.to_owned(), v.value());
            }
            let hist = history::load(&h_stats, &h_sums, name).map_err(|e| self.err(format!("history of {name}: {e}")))?;
            let external_history = history::load_external(&h_external, name).map_err(|e| self.err(format!("external history of {name}: {e}")))?;
            let (first_item, external_next) = st.external_window.unwrap_or((0, 0));
            let mut external_recent = Vec::new();
            for r in external_window.range((name, 0)..=(name, u64::MAX)).map_err(|e| self.err(e))? {
                let (k, v) = r.map_err(|e| self.err(e))?;
                let first = k.value().1;
                let bad = || self.err(format!("external window block {first} of {name} does not decode"));
                let (n, values) = decode_values(v.value()).ok_or_else(bad)?;
                let items = crate::external::window::decode_items(&values, s.external.len()).filter(|i| i.len() as u64 == n).ok_or_else(bad)?;
                external_recent.extend(items.into_iter().enumerate().filter(|(i, _)| (first_item..external_next).contains(&(first + *i as u64))).map(|(_, it)| it));
            }
            if external_recent.len() as u64 != external_next.saturating_sub(first_item) {
                return Err(self.err(format!("external window of {name} has {} items from item {first_item}, expected {}", external_recent.len(), external_next.saturating_sub(first_item))));
            }
            let spec = SessionSpec { name: s.name, refset: s.refset, config: s.config, labels: s.labels, window: s.window, resampling: s.resampling, target_language: s.target_language, guard_settings: s.guard_settings, external: s.external };
            snap.sessions.push(LoadedSession {
                spec,
                refset_digest: s.refset_digest,
                created_unix: s.created_unix,
                cumulative: st.cumulative,
                counts: st.counts,
                records: rows,
                records_from,
                window_len: live as usize,
                replicates: saved,
                next_row: st.next_row,
                marks: m,
                history: hist,
                external_history,
                external: st.external,
                external_recent,
                external_next,
            });
        }
        Ok(snap)
    }

    fn write<T>(&self, f: impl FnOnce(&redb::WriteTransaction) -> Result<T, redb::Error>) -> Result<T, StoreError> {
        let txn = self.db.begin_write().map_err(|e| self.err(e))?;
        let out = f(&txn).map_err(|e| self.err(e))?;
        txn.commit().map_err(|e| self.err(e))?;
        Ok(out)
    }

    /// Record `set` as the current version of `name`.
    pub fn put_refset(&self, name: &str, set: &RefSet) -> Result<(), StoreError> {
        let digest = set.digest_hex();
        self.write(|txn| {
            let mut versions = txn.open_table(VERSIONS)?;
            if versions.get(digest.as_str())?.is_none() {
                versions.insert(digest.as_str(), set.encode().as_slice())?;
            }
            drop(versions);
            txn.open_table(NAMES)?.insert(name, digest.as_str())?;
            gc_versions(txn)
        })
    }

    /// Forget the name `name` (versions still used by sessions stay).
    pub fn delete_refset(&self, name: &str) -> Result<(), StoreError> {
        self.write(|txn| {
            txn.open_table(NAMES)?.remove(name)?;
            gc_versions(txn)
        })
    }

    /// Record a new session over `set`, a version no name refers to (a reference-free
    /// session's empty set): the version first (kept while the session uses it), then the
    /// session as [`Store::put_session`] records it.
    pub fn put_session_over(&self, spec: &SessionSpec, set: &RefSet, created_unix: i64) -> Result<(), StoreError> {
        let digest = set.digest_hex();
        self.write(|txn| {
            let mut versions = txn.open_table(VERSIONS)?;
            if versions.get(digest.as_str())?.is_none() {
                versions.insert(digest.as_str(), set.encode().as_slice())?;
            }
            Ok(())
        })?;
        self.put_session(spec, &digest, created_unix)
    }

    /// Record a new session (its statistics start empty).
    pub fn put_session(&self, spec: &SessionSpec, refset_digest: &str, created_unix: i64) -> Result<(), StoreError> {
        let s = StoredSession { name: spec.name.clone(), refset: spec.refset.clone(), refset_digest: refset_digest.to_owned(), config: spec.config, labels: spec.labels.clone(), window: spec.window, created_unix, resampling: spec.resampling, target_language: spec.target_language.clone(), guard_settings: spec.guard_settings.clone(), external: spec.external.clone() };
        let bytes = serde_json::to_vec(&s).map_err(|e| self.err(e))?;
        self.write(|txn| {
            txn.open_table(SESSIONS)?.insert(spec.name.as_str(), bytes.as_slice())?;
            clear_session_data(txn, &spec.name, true)?;
            history::clear(txn, &spec.name)?;
            txn.open_table(REPLICATES)?.insert(spec.name.as_str(), encode_replicates(&SavedReplicates { covered_to: 0, complete: true, sums: Vec::new() }).as_slice())?;
            Ok(())
        })
    }

    /// Remove a session and everything it holds.
    pub fn delete_session(&self, name: &str) -> Result<(), StoreError> {
        self.write(|txn| {
            txn.open_table(SESSIONS)?.remove(name)?;
            clear_session_data(txn, name, true)?;
            history::clear(txn, name)?;
            gc_versions(txn)
        })
    }

    /// Zero a session's statistics; sequence marks stay; window row ids continue from `next_row`.
    pub fn reset_session(&self, name: &str, next_row: u64) -> Result<(), StoreError> {
        let st = serde_json::to_vec(&StoredStats { next_row, ..Default::default() }).map_err(|e| self.err(e))?;
        self.write(|txn| {
            clear_session_data(txn, name, false)?;
            txn.open_table(STATS)?.insert(name, st.as_slice())?;
            txn.open_table(REPLICATES)?.insert(name, encode_replicates(&SavedReplicates { covered_to: next_row, complete: true, sums: Vec::new() }).as_slice())?;
            Ok(())
        })
    }

    /// Write the effects of several applied batches in one transaction (group commit). Later
    /// writes of the same session win (they carry the newer totals).
    pub fn commit_batches(&self, writes: &[BatchWrite<'_>]) -> Result<(), StoreError> {
        // Coalesce per session: its new window records become one block (their ids follow each
        // other: the commit thread is the only writer), its totals the last write's.
        let mut order: Vec<&str> = Vec::new();
        let mut by_session: HashMap<&str, SessionBlocks<'_>> = HashMap::new();
        for w in writes {
            let e = by_session.entry(w.session).or_insert_with(|| {
                order.push(w.session);
                SessionBlocks::default()
            });
            let a = w.applied;
            e.last = Some(a);
            if let Some(r) = &a.save_replicates {
                e.replicates = Some(r);
            }
            if let Some((producer, seq)) = &a.mark {
                e.marks.push((producer.as_str(), *seq));
            }
            if let Some(x) = a.external_rows.as_ref().filter(|x| x.items > 0) {
                match e.external_blocks.last_mut() {
                    Some((first, count, values)) if *first + *count == x.first_id => {
                        *count += x.items;
                        values.extend_from_slice(&x.values);
                    }
                    _ => e.external_blocks.push((x.first_id, x.items, x.values.clone())),
                }
            }
            let n = a.batch.scored;
            if n == 0 {
                continue;
            }
            match e.blocks.last_mut() {
                Some((first, count, values)) if *first + *count == a.first_row => {
                    *count += n;
                    values.extend_from_slice(&a.rows);
                }
                _ => e.blocks.push((a.first_row, n, a.rows.clone())),
            }
        }
        let mut encoded = Vec::with_capacity(order.len());
        for name in &order {
            let e = &by_session[name];
            let Some(last) = e.last else { continue };
            let st = StoredStats { cumulative: last.cumulative, counts: last.counts, next_row: last.next_row, external: last.external.clone(), external_window: last.external_window };
            let stats = serde_json::to_vec(&st).map_err(|e| self.err(e))?;
            let blocks: Vec<(u64, Vec<u8>)> = e.blocks.iter().map(|(first, n, values)| (*first, encode_block(*n, values))).collect();
            let reps = e.replicates.map(encode_replicates);
            let external_blocks: Vec<(u64, Vec<u8>)> = e.external_blocks.iter().map(|(first, n, values)| (*first, encode_block(*n, values))).collect();
            let external_from = last.external_window.map(|(first, _)| first);
            encoded.push((*name, stats, blocks, last.keep_from, reps, external_blocks, external_from));
        }
        let history_ops = history::encode(writes).map_err(|e| self.err(e))?;
        self.write(|txn| {
            history::apply(txn, &history_ops)?;
            let mut stats = txn.open_table(STATS)?;
            let mut window = txn.open_table(WINDOW)?;
            let mut marks = txn.open_table(MARKS)?;
            let mut replicates = txn.open_table(REPLICATES)?;
            let mut external_window = txn.open_table(EXTERNAL_WINDOW)?;
            for (name, st, blocks, first_live, reps, external_blocks, external_from) in &encoded {
                stats.insert(*name, st.as_slice())?;
                if let Some(r) = reps {
                    replicates.insert(*name, r.as_slice())?;
                }
                // Records to keep: the window's and those the replicate copy does not cover.
                put_blocks(&mut window, name, blocks, Some(*first_live))?;
                put_blocks(&mut external_window, name, external_blocks, *external_from)?;
                for (producer, seq) in &by_session[name].marks {
                    marks.insert((*name, *producer), *seq)?;
                }
            }
            Ok(())
        })
    }
}

/// Write a session's new blocks of `table`, then drop its blocks that hold only records before
/// `keep_from` (when given): of the blocks that start at or before it, all but the last.
fn put_blocks(table: &mut redb::Table<'_, (&str, u64), &[u8]>, name: &str, blocks: &[(u64, Vec<u8>)], keep_from: Option<u64>) -> Result<(), redb::Error> {
    for (first, b) in blocks {
        table.insert((name, *first), b.as_slice())?;
    }
    let Some(keep_from) = keep_from else { return Ok(()) };
    let mut old = Vec::new();
    for r in table.range((name, 0)..=(name, keep_from))? {
        old.push(r?.0.value().1);
    }
    old.pop();
    for first in old {
        table.remove((name, first))?;
    }
    Ok(())
}

/// Schema 1 -> 2: each session's window records, one row each, become one block.
fn upgrade_rows_to_blocks(txn: &redb::WriteTransaction) -> Result<(), String> {
    let e = |e: redb::Error| e.to_string();
    let mut runs: BTreeMap<String, (u64, u64, Vec<u64>)> = BTreeMap::new();
    {
        let rows = txn.open_table(WINDOW_ROWS).map_err(|x| e(x.into()))?;
        for r in rows.iter().map_err(|x| e(x.into()))? {
            let (k, v) = r.map_err(|x| e(x.into()))?;
            let (session, id) = k.value();
            let run = runs.entry(session.to_owned()).or_insert((id, 0, Vec::new()));
            if run.0 + run.1 != id {
                return Err(format!("window rows of {session} are not consecutive at {id}"));
            }
            run.1 += 1;
            run.2.extend(v.value().chunks_exact(8).map(|c| u64::from_le_bytes(c.try_into().unwrap_or([0; 8]))));
        }
    }
    let mut window = txn.open_table(WINDOW).map_err(|x| e(x.into()))?;
    for (session, (first, n, values)) in &runs {
        window.insert((session.as_str(), *first), encode_block(*n, values).as_slice()).map_err(|x| e(x.into()))?;
    }
    drop(window);
    txn.delete_table(WINDOW_ROWS).map_err(|x| e(x.into()))?;
    Ok(())
}

fn parse_digest(hex: &str) -> Option<[u8; 32]> {
    if hex.len() != 64 {
        return None;
    }
    let mut out = [0u8; 32];
    for (i, o) in out.iter_mut().enumerate() {
        *o = u8::from_str_radix(hex.get(2 * i..2 * i + 2)?, 16).ok()?;
    }
    Some(out)
}

/// Delete a session's statistics and window rows (and its marks when `marks`).
fn clear_session_data(txn: &redb::WriteTransaction, name: &str, marks: bool) -> Result<(), redb::Error> {
    txn.open_table(STATS)?.remove(name)?;
    txn.open_table(REPLICATES)?.remove(name)?;
    txn.open_table(WINDOW)?.retain_in((name, 0)..=(name, u64::MAX), |_, _| false)?;
    txn.open_table(EXTERNAL_WINDOW)?.retain_in((name, 0)..=(name, u64::MAX), |_, _| false)?;
    if marks {
        let mut m = txn.open_table(MARKS)?;
        let mut keys: Vec<String> = Vec::new();
        for r in m.range((name, "")..)? {
            let (k, _) = r?;
            let (s, p) = k.value();
            if s != name {
                break;
            }
            keys.push(p.to_owned());
        }
        for p in keys {
            m.remove((name, p.as_str()))?;
        }
    }
    Ok(())
}

/// Drop versions that no name and no session refers to.
fn gc_versions(txn: &redb::WriteTransaction) -> Result<(), redb::Error> {
    let mut used: std::collections::HashSet<String> = txn.open_table(NAMES)?.iter()?.map_while(|r| r.ok()).map(|(_, v)| v.value().to_owned()).collect();
    for r in txn.open_table(SESSIONS)?.iter()? {
        let (_, v) = r?;
        if let Ok(s) = serde_json::from_slice::<StoredSession>(v.value()) {
            used.insert(s.refset_digest);
        }
    }
    txn.open_table(VERSIONS)?.retain(|k, _| used.contains(k))?;
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::refs::SegmentInput;

    fn dir(name: &str) -> PathBuf {
        let d = std::env::temp_dir().join(format!("mtgauge-store-{name}-{}", std::process::id()));
        let _ = std::fs::remove_dir_all(&d);
        d
    }

    fn set(text: &str) -> RefSet {
        RefSet::new(vec![SegmentInput { id: "1".into(), source: Some("Gate C".into()), refs: vec![text.into()] }]).unwrap()
    }

    #[test]
    fn round_trip_and_versions() {
        let d = dir("rt");
        let spec = SessionSpec { name: "s".into(), refset: "r".into(), config: ScoreConfig::default(), labels: [("model".into(), "v7".into())].into(), window: 3, resampling: Resampling::default(), target_language: None, guard_settings: Vec::new(), external: Default::default() };
        {
            let st = Store::open(&d).unwrap();
            st.put_refset("r", &set("Tor C")).unwrap();
            st.put_session(&spec, &set("Tor C").digest_hex(), 42).unwrap();
            st.put_refset("r", &set("Gate C")).unwrap();
            let one = CorpusStats { segments: 1, ..Default::default() };
            let applied = Applied { mark: Some(("p".into(), 7)), first_row: 0, rows: vec![1, 2, 3], batch: Counts { scored: 1, unknown: 2, rejected: 0, ..Default::default() }, cumulative: one, recent: one, counts: Counts { scored: 1, unknown: 2, rejected: 0, ..Default::default() }, next_row: 1, ..Default::default() };
            st.commit_batches(&[BatchWrite { session: "s", applied: &applied }]).unwrap();
            assert!(matches!(Store::open(&d), Err(StoreError::InUse(_))), "a second open is refused");
        }
        let st = Store::open(&d).unwrap();
        let snap = st.load().unwrap();
        assert_eq!(snap.versions.len(), 2, "the session keeps the old version alive");
        assert_eq!(snap.names["r"], set("Gate C").digest_hex());
        let s = &snap.sessions[0];
        assert_eq!(s.refset_digest, set("Tor C").digest_hex());
        assert_eq!((s.counts.unknown, s.marks["p"], s.records.clone(), s.next_row, s.created_unix), (2, 7, vec![vec![1, 2, 3]], 1, 42));
        st.delete_session("s").unwrap();
        let snap = st.load().unwrap();
        assert_eq!(snap.versions.len(), 1, "unused version collected");
        assert!(snap.sessions.is_empty());
    }

    /// Random per-segment statistics of a plausible shape.
    fn stats(rng: &mut crate::rng::SplitMix64) -> crate::metric::SegmentStats {
        let mut s = crate::metric::SegmentStats::default();
        for n in 0..4 {
            s.bleu.totals[n] = rng.below(30);
            s.bleu.matches[n] = rng.below(s.bleu.totals[n] + 1);
            s.chrf.char.hyp[n] = 200 + rng.below(300);
            s.chrf.char.matches[n] = rng.below(200);
            s.chrf.char.reference[n] = 200 + rng.below(300);
        }
        (s.bleu.hyp_len, s.bleu.ref_len) = (rng.below(40), rng.below(40));
        s
    }

    /// Group commits of batches of random sizes (some several per group, some all unknown, one
    /// reset) keep exactly the in-memory window, in a handful of blocks, across reopenings.
    #[test]
    fn window_blocks_hold_exactly_the_window() {
        use crate::session::{Outcome, Session};
        let d = dir("blocks");
        let refs = std::sync::Arc::new(set("Tor C"));
        let config: ScoreConfig = "bleu chrf".parse().unwrap();
        let spec = SessionSpec { name: "s".into(), refset: "r".into(), config, labels: BTreeMap::new(), window: 37, resampling: Resampling { resamples: 20, seed: 5 }, target_language: None, guard_settings: Vec::new(), external: Default::default() };
        let session = Session::new(spec.clone(), std::sync::Arc::clone(&refs), 1);
        // Copies of the replicate sums every 100 records here, so that some are written.
        session.state().replicates.as_mut().unwrap().set_save_every(100);
        let mut rng = crate::rng::SplitMix64::new(3);
        let st = Store::open(&d).unwrap();
        st.put_refset("r", &refs).unwrap();
        st.put_session(&spec, &refs.digest_hex(), 1).unwrap();
        let mut seq = 0;
        let mut commits: Vec<(u64, u64)> = Vec::new();
        for round in 0..60 {
            if round == 40 {
                let next_row = session.state().window.next_id();
                session.reset();
                st.reset_session("s", next_row).unwrap();
                commits.clear();
            }
            let mut group = Vec::new();
            for _ in 0..1 + rng.below(3) {
                seq += 1;
                let n = rng.below(25) as usize;
                let outcomes: Vec<Outcome> = (0..n).map(|i| if i % 7 == 3 { Outcome::Unknown } else { Outcome::Scored { stats: stats(&mut rng), by_source: false, index: 0 } }).collect();
                group.push(session.apply("p", seq, &outcomes, 0, None).unwrap());
            }
            let writes: Vec<BatchWrite<'_>> = group.iter().map(|applied| BatchWrite { session: "s", applied }).collect();
            st.commit_batches(&writes).unwrap();
            // One block per group that added records; only the groups with a record to keep
            // stay: in the window, or not yet covered by the last copy of the replicate sums.
            let added: u64 = group.iter().map(|a| a.batch.scored).sum();
            if added > 0 {
                commits.push((group[0].first_row, added));
            }
            let keep_from = group.last().unwrap().keep_from;
            {
                let mem = session.state();
                assert_eq!(keep_from, mem.window.first_id().min(mem.replicates.as_ref().unwrap().saved_to()));
            }
            let live = commits.iter().filter(|(first, n)| first + n > keep_from).count() as u64;
            let blocks = st.db.begin_read().unwrap().open_table(WINDOW).unwrap().len().unwrap();
            assert_eq!(blocks, live, "round {round}: blocks kept");
        }
        drop(st);
        let snap = Store::open(&d).unwrap().load().unwrap();
        let s = &snap.sessions[0];
        let mem = session.state();
        let back = crate::session::Window::restore(37, &config, s.records[s.records.len() - s.window_len..].iter().cloned(), s.next_row).unwrap();
        assert_eq!((back.stats(), back.len(), s.next_row, s.cumulative, s.counts, s.marks["p"]), (mem.window.stats(), mem.window.len(), mem.window.next_id(), mem.cumulative, mem.counts, seq));
        assert_eq!(back.len(), 37, "the window is full again after the reset");
        assert!(s.replicates.as_ref().is_some_and(|r| r.covered_to > 0 && r.complete), "a copy of the replicate sums was written: {:?}", s.replicates.as_ref().map(|r| r.covered_to));
        let reps = crate::session::SessionReplicates::restore(&config, spec.resampling, &back, s.replicates.clone(), s.records_from, &s.records, |c| session.key_of(c)).unwrap();
        drop(mem);
        let restored = Session::new(spec.clone(), std::sync::Arc::clone(&refs), 1);
        restored.restore(crate::session::SessionState { cumulative: s.cumulative, window: back, counts: s.counts, producers: s.marks.clone(), replicates: Some(reps) });
        let (c1, r1) = session.replicates();
        let (c2, r2) = restored.replicates();
        assert!(c1.is_some() && r1.is_some());
        assert_eq!((c1, r1), (c2, r2), "replicate sums rebuilt from the copy and the kept records");
    }

    /// The external window's items: one block per group commit that added items; only the
    /// blocks with an item still in the window stay (a reset drops them all), and the items read
    /// back rebuild the same window sums.
    #[test]
    fn external_window_blocks_hold_exactly_the_window() {
        use crate::external::{Declaration, ExternalSpec};
        use crate::session::Session;
        let d = dir("external-blocks");
        let refs = std::sync::Arc::new(set("Tor C"));
        let external = Declaration::new(vec![ExternalSpec::new("qe", -1.0, 1.0).unwrap()]).unwrap();
        let spec = SessionSpec { name: "s".into(), refset: "r".into(), config: ScoreConfig::default(), labels: BTreeMap::new(), window: 29, resampling: Resampling { resamples: 20, seed: 5 }, target_language: None, guard_settings: Vec::new(), external };
        let session = Session::new(spec.clone(), std::sync::Arc::clone(&refs), 1);
        let mut rng = crate::rng::SplitMix64::new(8);
        let st = Store::open(&d).unwrap();
        st.put_refset("r", &refs).unwrap();
        st.put_session(&spec, &refs.digest_hex(), 1).unwrap();
        let (mut seq, mut commits): (u64, Vec<(u64, u64)>) = (0, Vec::new());
        for round in 0..50 {
            if round == 30 {
                session.reset();
                st.reset_session("s", session.state().window.next_id()).unwrap();
                commits.clear();
            }
            let mut group = Vec::new();
            for _ in 0..1 + rng.below(3) {
                seq += 1;
                // Values of either sign, some items without a key of their own.
                let items: Vec<(u64, crate::external::ItemValues)> = (0..rng.below(12)).map(|_| (rng.below(40), spec.external.check_item([("qe", rng.below(2_000_001) as f64 / 1e6 - 1.0)]).unwrap())).collect();
                let mut applied = session.apply("p", seq, &[], 0, None).unwrap();
                applied.external_rows = Some(session.apply_external(&session.external_delta(&items).unwrap()).unwrap());
                let (copy, ids) = session.external_durable();
                (applied.external, applied.external_window) = (Some(copy), Some(ids));
                group.push(applied);
            }
            st.commit_batches(&group.iter().map(|applied| BatchWrite { session: "s", applied }).collect::<Vec<_>>()).unwrap();
            let added: u64 = group.iter().map(|a| a.external_rows.as_ref().unwrap().items).sum();
            if added > 0 {
                commits.push((group[0].external_rows.as_ref().unwrap().first_id, added));
            }
            let (first, _) = group.last().unwrap().external_window.unwrap();
            let live = commits.iter().filter(|(f, n)| f + n > first).count() as u64;
            let blocks = st.db.begin_read().unwrap().open_table(EXTERNAL_WINDOW).unwrap().len().unwrap();
            assert_eq!(blocks, live, "round {round}: blocks kept");
        }
        drop(st);
        let snap = Store::open(&d).unwrap().load().unwrap();
        let s = &snap.sessions[0];
        let restored = Session::new(spec.clone(), std::sync::Arc::clone(&refs), 1);
        restored.restore_external(s.external.clone().unwrap(), s.external_recent.clone(), s.external_next).unwrap();
        assert_eq!(s.external_recent.len(), 29, "the window is full again after the reset");
        assert_eq!(restored.external_recent(), session.external_recent());
        assert_eq!(restored.external_durable(), session.external_durable());
    }

    /// A store of schema 1 (one stored row per window record) is upgraded on open: the same
    /// window loads, and the old table is gone.
    #[test]
    fn schema_one_stores_are_upgraded() {
        let d = dir("upgrade");
        let refs = set("Tor C");
        let config: ScoreConfig = "bleu:order=2".parse().unwrap();
        let spec = SessionSpec { name: "s".into(), refset: "r".into(), config, labels: BTreeMap::new(), window: 3, resampling: Resampling::default(), target_language: None, guard_settings: Vec::new(), external: Default::default() };
        {
            let st = Store::open(&d).unwrap();
            st.put_refset("r", &refs).unwrap();
            st.put_session(&spec, &refs.digest_hex(), 1).unwrap();
        }
        // Records 2, 3, 4 of five, as the first layout kept them (6 values each for order 2).
        let rows: Vec<Vec<u64>> = (2..5u64).map(|i| vec![i, i + 1, 10, 10, 12, 11 + i]).collect();
        let cumulative = CorpusStats { segments: 5, ..Default::default() };
        {
            let db = Database::create(d.join(STORE_FILE)).unwrap();
            let txn = db.begin_write().unwrap();
            txn.open_table(META).unwrap().insert("schema_version", SCHEMA_ROWS).unwrap();
            txn.delete_table(WINDOW).unwrap();
            txn.delete_table(REPLICATES).unwrap();
            let mut old = txn.open_table(WINDOW_ROWS).unwrap();
            for (i, r) in rows.iter().enumerate() {
                let bytes: Vec<u8> = r.iter().flat_map(|v| v.to_le_bytes()).collect();
                old.insert(("s", 2 + i as u64), bytes.as_slice()).unwrap();
            }
            drop(old);
            let st = serde_json::to_vec(&StoredStats { cumulative, counts: Counts { scored: 5, ..Default::default() }, next_row: 5, external: None, external_window: None }).unwrap();
            txn.open_table(STATS).unwrap().insert("s", st.as_slice()).unwrap();
            txn.commit().unwrap();
        }
        let st = Store::open(&d).unwrap();
        let s = &st.load().unwrap().sessions[0];
        assert_eq!((&s.records, s.window_len, s.next_row, s.counts.scored), (&rows, 3, 5, 5));
        assert_eq!(s.replicates, None, "no copy of replicate sums: they are incomplete");
        let txn = st.db.begin_read().unwrap();
        assert_eq!(txn.open_table(META).unwrap().get("schema_version").unwrap().unwrap().value(), SCHEMA_VERSION);
        assert!(txn.open_table(WINDOW_ROWS).is_err(), "the schema 1 table is gone");
    }

    #[test]
    fn varints_round_trip() {
        for v in [0, 1, 127, 128, 300, u32::MAX as u64, u64::MAX] {
            let mut b = Vec::new();
            put_varint(&mut b, v);
            assert_eq!(get_varint(&mut b.as_slice()), Some(v), "{v}");
        }
        assert_eq!(decode_block(&encode_block(2, &[1, 2, 3, 4])), Some(vec![vec![1, 2], vec![3, 4]]));
        assert_eq!(decode_block(&encode_block(2, &[1, 2, 3])), None, "values not a multiple of the records");
        assert_eq!(decode_block(&[0x80]), None, "a truncated varint");
    }

    #[test]
    fn sessions_stored_with_the_first_configuration_names_still_load() {
        let d = dir("flat");
        let digest = set("Tor C").digest_hex();
        {
            let st = Store::open(&d).unwrap();
            st.put_refset("r", &set("Tor C")).unwrap();
        }
        {
            // A session record as mtgauge 0.1 wrote it, before the interface was renamed.
            let old = format!(
                r#"{{"name":"s","refset":"r","refset_digest":"{digest}","config":{{"metrics":["bleu","chrf++"],"tokenizer":"nist","lowercase":true,
                "bleu_order":3,"ref_length":"shortest","smoothing":"plus-one","epsilon":0.05,"chrf_char_order":5,"chrf_word_order":1,"beta":1.5}},
                "labels":{{"model":"v6"}},"window":4,"created_unix":7}}"#
            );
            let db = Database::create(d.join(STORE_FILE)).unwrap();
            let txn = db.begin_write().unwrap();
            txn.open_table(SESSIONS).unwrap().insert("s", old.as_bytes()).unwrap();
            txn.commit().unwrap();
        }
        let snap = Store::open(&d).unwrap().load().unwrap();
        let want: ScoreConfig = "tokenizer=nist caseless=yes bleu:order=3,ref-length=shortest,smoothing=plus-one,epsilon=0.05 chrf++:chars=5,words=1,beta=1.5".parse().unwrap();
        let s = &snap.sessions[0];
        assert_eq!((s.spec.config, s.spec.window, s.spec.labels["model"].as_str()), (want, 4, "v6"));
    }

    #[test]
    fn other_schema_versions_are_refused_with_a_clear_message() {
        let d = dir("schema");
        drop(Store::open(&d).unwrap());
        for (v, hint) in [(SCHEMA_VERSION + 1, "newer"), (0, "older")] {
            {
                let db = Database::create(d.join(STORE_FILE)).unwrap();
                let txn = db.begin_write().unwrap();
                txn.open_table(META).unwrap().insert("schema_version", v).unwrap();
                txn.commit().unwrap();
            }
            let e = Store::open(&d).err().expect("must refuse").to_string();
            assert!(e.contains(STORE_FILE) && e.contains(&format!("schema version {v}")) && e.contains(hint), "{e}");
        }
    }

    #[test]
    fn damaged_files_give_clear_errors() {
        let d = dir("bad");
        std::fs::create_dir_all(&d).unwrap();
        std::fs::write(d.join(STORE_FILE), b"this is not a store at all, just words").unwrap();
        let e = Store::open(&d).err().expect("must fail").to_string();
        assert!(e.contains(STORE_FILE), "{e}");
        // A truncated store.
        let d2 = dir("trunc");
        {
            let st = Store::open(&d2).unwrap();
            st.put_refset("r", &set("Tor C")).unwrap();
        }
        let f = d2.join(STORE_FILE);
        let len = std::fs::metadata(&f).unwrap().len();
        let file = std::fs::OpenOptions::new().write(true).open(&f).unwrap();
        file.set_len(len / 3).unwrap();
        drop(file);
        match Store::open(&d2).and_then(|s| s.load()) {
            Ok(snap) => panic!("a truncated store opened: {snap:?}"),
            Err(e) => assert!(e.to_string().contains(STORE_FILE), "{e}"),
        }
    }
}
