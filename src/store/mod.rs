//! Durable state in an embedded ACID store (redb): reference-set versions (their canonical
//! encoding, so a restart rebuilds everything without the original files), reference-set names,
//! session definitions, cumulative statistics and counters, the `recent` window rows, and the
//! per-producer sequence marks that make batches count exactly once.
//!
//! Synchronous: the server calls it from blocking threads. One process opens a store at a time.

use std::collections::{BTreeMap, HashMap};
use std::path::{Path, PathBuf};

use redb::{Database, ReadableDatabase, ReadableTable, ReadableTableMetadata, TableDefinition};
use serde::{Deserialize, Serialize};

use crate::metric::{CorpusStats, ScoreConfig};
use crate::refs::RefSet;
use crate::session::{Applied, Counts, SessionSpec};

/// File name of the store inside `--data-dir`.
pub const STORE_FILE: &str = "mtgauge.redb";
/// Data directory unless configured (the conventional place of a service's state).
pub const DEFAULT_DATA_DIR: &str = "/var/lib/mtgauge";
/// Version of the layout below; bump on any incompatible change.
pub const SCHEMA_VERSION: u64 = 1;

const META: TableDefinition<&str, u64> = TableDefinition::new("meta");
/// Reference-set digest (hex) -> canonical encoding.
const VERSIONS: TableDefinition<&str, &[u8]> = TableDefinition::new("refset_versions");
/// Reference-set name -> digest (hex) of its current version.
const NAMES: TableDefinition<&str, &str> = TableDefinition::new("refset_names");
/// Session name -> JSON of [`StoredSession`].
const SESSIONS: TableDefinition<&str, &[u8]> = TableDefinition::new("sessions");
/// Session name -> JSON of [`StoredStats`].
const STATS: TableDefinition<&str, &[u8]> = TableDefinition::new("session_stats");
/// (session, row id) -> window row (little-endian u64 values).
const WINDOW: TableDefinition<(&str, u64), &[u8]> = TableDefinition::new("window_rows");
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
}

#[derive(Debug, Default, Serialize, Deserialize)]
struct StoredStats {
    cumulative: CorpusStats,
    counts: Counts,
    next_row: u64,
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
    /// Window rows, oldest first.
    pub window_rows: Vec<Vec<u64>>,
    /// Next window row id.
    pub next_row: u64,
    /// Sequence marks.
    pub marks: HashMap<String, u64>,
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

fn row_bytes(row: &[u64]) -> Vec<u8> {
    row.iter().flat_map(|v| v.to_le_bytes()).collect()
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
            let mut rows = Vec::new();
            for r in window.range((name, 0)..=(name, u64::MAX)).map_err(|e| self.err(e))? {
                let (_, v) = r.map_err(|e| self.err(e))?;
                let b = v.value();
                if b.len() % 8 != 0 {
                    return Err(self.err(format!("window row of {name} has {} bytes", b.len())));
                }
                rows.push(b.chunks_exact(8).map(|c| u64::from_le_bytes(c.try_into().unwrap_or([0; 8]))).collect());
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
            let spec = SessionSpec { name: s.name, refset: s.refset, config: s.config, labels: s.labels, window: s.window };
            snap.sessions.push(LoadedSession { spec, refset_digest: s.refset_digest, created_unix: s.created_unix, cumulative: st.cumulative, counts: st.counts, window_rows: rows, next_row: st.next_row, marks: m });
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

    /// Record a new session (its statistics start empty).
    pub fn put_session(&self, spec: &SessionSpec, refset_digest: &str, created_unix: i64) -> Result<(), StoreError> {
        let s = StoredSession { name: spec.name.clone(), refset: spec.refset.clone(), refset_digest: refset_digest.to_owned(), config: spec.config, labels: spec.labels.clone(), window: spec.window, created_unix };
        let bytes = serde_json::to_vec(&s).map_err(|e| self.err(e))?;
        self.write(|txn| {
            txn.open_table(SESSIONS)?.insert(spec.name.as_str(), bytes.as_slice())?;
            clear_session_data(txn, &spec.name, true)
        })
    }

    /// Remove a session and everything it holds.
    pub fn delete_session(&self, name: &str) -> Result<(), StoreError> {
        self.write(|txn| {
            txn.open_table(SESSIONS)?.remove(name)?;
            clear_session_data(txn, name, true)?;
            gc_versions(txn)
        })
    }

    /// Zero a session's statistics; sequence marks stay; window row ids continue from `next_row`.
    pub fn reset_session(&self, name: &str, next_row: u64) -> Result<(), StoreError> {
        let st = serde_json::to_vec(&StoredStats { next_row, ..Default::default() }).map_err(|e| self.err(e))?;
        self.write(|txn| {
            clear_session_data(txn, name, false)?;
            txn.open_table(STATS)?.insert(name, st.as_slice())?;
            Ok(())
        })
    }

    /// Write the effects of several applied batches in one transaction (group commit). Later
    /// writes of the same session win (they carry the newer totals).
    pub fn commit_batches(&self, writes: &[BatchWrite<'_>]) -> Result<(), StoreError> {
        let mut latest: HashMap<&str, Vec<u8>> = HashMap::new();
        for w in writes {
            let st = StoredStats { cumulative: w.applied.cumulative, counts: w.applied.counts, next_row: w.applied.next_row };
            latest.insert(w.session, serde_json::to_vec(&st).map_err(|e| self.err(e))?);
        }
        self.write(|txn| {
            let mut stats = txn.open_table(STATS)?;
            for (s, b) in &latest {
                stats.insert(*s, b.as_slice())?;
            }
            let mut window = txn.open_table(WINDOW)?;
            let mut marks = txn.open_table(MARKS)?;
            for w in writes {
                for p in &w.applied.pushed {
                    window.insert((w.session, p.id), row_bytes(&p.row).as_slice())?;
                    if let Some(d) = p.dropped {
                        window.remove((w.session, d))?;
                    }
                }
                if let Some((producer, seq)) = &w.applied.mark {
                    marks.insert((w.session, producer.as_str()), *seq)?;
                }
            }
            Ok(())
        })
    }
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
    txn.open_table(WINDOW)?.retain_in((name, 0)..=(name, u64::MAX), |_, _| false)?;
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
        let spec = SessionSpec { name: "s".into(), refset: "r".into(), config: ScoreConfig::default(), labels: [("model".into(), "v7".into())].into(), window: 3 };
        {
            let st = Store::open(&d).unwrap();
            st.put_refset("r", &set("Tor C")).unwrap();
            st.put_session(&spec, &set("Tor C").digest_hex(), 42).unwrap();
            st.put_refset("r", &set("Gate C")).unwrap();
            let applied = Applied { mark: Some(("p".into(), 7)), pushed: vec![crate::session::Pushed { id: 0, row: vec![1, 2, 3], dropped: None }], cumulative: CorpusStats { segments: 1, ..Default::default() }, counts: Counts { scored: 1, unknown: 2, rejected: 0 }, next_row: 1, ..Default::default() };
            st.commit_batches(&[BatchWrite { session: "s", applied: &applied }]).unwrap();
            assert!(matches!(Store::open(&d), Err(StoreError::InUse(_))), "a second open is refused");
        }
        let st = Store::open(&d).unwrap();
        let snap = st.load().unwrap();
        assert_eq!(snap.versions.len(), 2, "the session keeps the old version alive");
        assert_eq!(snap.names["r"], set("Gate C").digest_hex());
        let s = &snap.sessions[0];
        assert_eq!(s.refset_digest, set("Tor C").digest_hex());
        assert_eq!((s.counts.unknown, s.marks["p"], s.window_rows.clone(), s.next_row, s.created_unix), (2, 7, vec![vec![1, 2, 3]], 1, 42));
        st.delete_session("s").unwrap();
        let snap = st.load().unwrap();
        assert_eq!(snap.versions.len(), 1, "unused version collected");
        assert!(snap.sessions.is_empty());
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
