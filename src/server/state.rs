//! The one owner of shared server state: reference sets and sessions behind one cloneable handle.
//!
//! DashMap registries; a session's statistics sit behind its own short std mutex (see
//! [`crate::session::Session::state`]). Nothing here awaits while holding a lock.

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};
use std::sync::Arc;
use std::time::{SystemTime, UNIX_EPOCH};

use dashmap::mapref::entry::Entry;
use dashmap::DashMap;

use super::error::{Result, ServiceError};
use crate::metric::ScoreConfig;
use crate::refs::{parse_jsonl, parse_plain, InputError, RefSet};
use crate::session::{check_labels, check_name, Session, SessionSpec, DEFAULT_WINDOW, MAX_WINDOW};

/// Most items in one batch unless configured.
pub const DEFAULT_MAX_BATCH_ITEMS: usize = 10_000;
/// Longest hypothesis or source text in bytes unless configured.
pub const DEFAULT_MAX_TEXT_BYTES: usize = 64 * 1024;
/// Most sessions unless configured.
pub const DEFAULT_MAX_SESSIONS: usize = 1_000;
/// Most reference sets unless configured.
pub const DEFAULT_MAX_REFSETS: usize = 100;
/// Largest reference-set input (all files of one set) in bytes unless configured.
pub const DEFAULT_MAX_REFSET_BYTES: u64 = 2 * 1024 * 1024 * 1024;

/// Configurable limits (config keys in parentheses in their errors).
#[derive(Debug, Clone, Copy)]
pub struct Limits {
    /// `limits.max_batch_items`.
    pub max_batch_items: usize,
    /// `limits.max_text_bytes`.
    pub max_text_bytes: usize,
    /// `limits.max_sessions`.
    pub max_sessions: usize,
    /// `limits.max_refsets`.
    pub max_refsets: usize,
    /// `limits.max_refset_bytes`.
    pub max_refset_bytes: u64,
}

impl Default for Limits {
    fn default() -> Self {
        Limits {
            max_batch_items: DEFAULT_MAX_BATCH_ITEMS,
            max_text_bytes: DEFAULT_MAX_TEXT_BYTES,
            max_sessions: DEFAULT_MAX_SESSIONS,
            max_refsets: DEFAULT_MAX_REFSETS,
            max_refset_bytes: DEFAULT_MAX_REFSET_BYTES,
        }
    }
}

/// A loaded reference-set version.
#[derive(Debug)]
pub struct LoadedSet {
    /// Registry name.
    pub name: String,
    /// The segments.
    pub set: Arc<RefSet>,
}

/// Input format of a reference set.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Format {
    /// Line-aligned plain text streams.
    Plain,
    /// One JSONL file.
    Jsonl,
}

/// Shared state; clone the handle freely.
#[derive(Clone)]
pub struct State {
    inner: Arc<Inner>,
}

struct Inner {
    refsets: DashMap<String, Arc<LoadedSet>>,
    sessions: DashMap<String, Arc<Session>>,
    /// (session, producer) pairs with a live stream.
    streaming: DashMap<(String, String), ()>,
    refset_dir: Option<PathBuf>,
    limits: Limits,
    /// Batches scored at once on the blocking pool: one per CPU, so that scoring never
    /// crowds out the threads that run the network and the health checks.
    scoring_slots: tokio::sync::Semaphore,
}

/// Seconds since the Unix epoch.
pub fn unix_now() -> i64 {
    SystemTime::now().duration_since(UNIX_EPOCH).map_or(0, |d| d.as_secs() as i64)
}

impl State {
    /// Empty state. `refset_dir`: where server-side loading may read (None: disabled).
    pub fn new(refset_dir: Option<PathBuf>, limits: Limits) -> Result<State> {
        let refset_dir = match refset_dir {
            Some(d) => Some(std::fs::canonicalize(&d).map_err(|e| ServiceError::Invalid(format!("--refset-dir {}: {e}", d.display())))?),
            None => None,
        };
        let slots = std::thread::available_parallelism().map_or(1, |n| n.get());
        Ok(State { inner: Arc::new(Inner { refsets: DashMap::new(), sessions: DashMap::new(), streaming: DashMap::new(), refset_dir, limits, scoring_slots: tokio::sync::Semaphore::new(slots) }) })
    }

    /// Wait for a scoring slot (see `scoring_slots`).
    pub async fn scoring_slot(&self) -> tokio::sync::SemaphorePermit<'_> {
        // The semaphore is never closed.
        self.inner.scoring_slots.acquire().await.expect("scoring semaphore is never closed")
    }

    /// The limits in force.
    pub fn limits(&self) -> &Limits {
        &self.inner.limits
    }

    /// Resolve a client-given path under the reference-set directory; anything that leaves it
    /// (`..`, absolute paths, symbolic links pointing outside) is refused.
    pub fn resolve_refset_path(&self, rel: &str) -> Result<PathBuf> {
        let Some(dir) = &self.inner.refset_dir else {
            return Err(ServiceError::PathDenied("server-side loading is disabled: start the server with --refset-dir".into()));
        };
        if rel.is_empty() {
            return Err(ServiceError::Invalid("empty path".into()));
        }
        let p = Path::new(rel);
        if p.is_absolute() || p.components().any(|c| !matches!(c, std::path::Component::Normal(_))) {
            return Err(ServiceError::PathDenied(format!("path '{}' must be relative to the reference-set directory, without '..'", rel.escape_debug())));
        }
        let full = std::fs::canonicalize(dir.join(p)).map_err(|e| ServiceError::Input(InputError::file(rel, e.to_string())))?;
        if !full.starts_with(dir) {
            return Err(ServiceError::PathDenied(format!("path '{}' leaves the reference-set directory", rel.escape_debug())));
        }
        Ok(full)
    }

    /// Parse a reference set from named byte buffers (CPU work: call from a blocking thread).
    pub fn parse_refset(&self, format: Format, files: &[(String, Vec<u8>)], source: Option<&(String, Vec<u8>)>) -> Result<RefSet> {
        let total: u64 = files.iter().chain(source).map(|(_, b)| b.len() as u64).sum();
        if total > self.inner.limits.max_refset_bytes {
            return Err(ServiceError::Limit { what: format!("reference set input of {total} bytes"), limit: self.inner.limits.max_refset_bytes, key: "limits.max_refset_bytes" });
        }
        let segments = match format {
            Format::Jsonl => {
                if files.len() != 1 || source.is_some() {
                    return Err(ServiceError::Invalid("a JSONL reference set is exactly one file, without a source file".into()));
                }
                parse_jsonl(&files[0].0, &files[0].1)?
            }
            Format::Plain => {
                if files.is_empty() {
                    return Err(ServiceError::Invalid("a plain reference set needs at least one reference file".into()));
                }
                let streams: Vec<(&str, &[u8])> = files.iter().map(|(n, b)| (n.as_str(), b.as_slice())).collect();
                parse_plain(&streams, source.map(|(n, b)| (n.as_str(), b.as_slice())))?
            }
        };
        RefSet::new(segments).map_err(|e| ServiceError::Invalid(format!("{}: {e}", files[0].0)))
    }

    /// Register a reference set under `name`.
    pub fn insert_refset(&self, name: &str, set: RefSet, replace: bool) -> Result<Arc<LoadedSet>> {
        check_name("reference set name", name)?;
        let loaded = Arc::new(LoadedSet { name: name.to_owned(), set: Arc::new(set) });
        let len = self.inner.refsets.len();
        match self.inner.refsets.entry(name.to_owned()) {
            Entry::Occupied(mut e) => {
                if !replace {
                    return Err(ServiceError::RefSetExists(name.to_owned()));
                }
                e.insert(Arc::clone(&loaded));
            }
            Entry::Vacant(e) => {
                if len >= self.inner.limits.max_refsets {
                    return Err(ServiceError::Limit { what: format!("{} reference sets", len + 1), limit: self.inner.limits.max_refsets as u64, key: "limits.max_refsets" });
                }
                e.insert(Arc::clone(&loaded));
            }
        }
        Ok(loaded)
    }

    /// A reference set by name.
    pub fn refset(&self, name: &str) -> Result<Arc<LoadedSet>> {
        self.inner.refsets.get(name).map(|e| Arc::clone(e.value())).ok_or_else(|| ServiceError::UnknownRefSet(name.to_owned()))
    }

    /// All reference sets, by name.
    pub fn refsets(&self) -> Vec<Arc<LoadedSet>> {
        let mut v: Vec<_> = self.inner.refsets.iter().map(|e| Arc::clone(e.value())).collect();
        v.sort_by(|a, b| a.name.cmp(&b.name));
        v
    }

    /// Remove a reference set (sessions keep their version).
    pub fn delete_refset(&self, name: &str) -> Result<()> {
        self.inner.refsets.remove(name).map(|_| ()).ok_or_else(|| ServiceError::UnknownRefSet(name.to_owned()))
    }

    /// Sessions bound to exactly this version of a set.
    pub fn sessions_using(&self, set: &Arc<RefSet>) -> usize {
        self.inner.sessions.iter().filter(|s| Arc::ptr_eq(s.value().refs(), set)).count()
    }

    /// Check a session definition and fill in defaults.
    pub fn session_spec(&self, name: &str, refset: &str, config: ScoreConfig, labels: BTreeMap<String, String>, window: usize) -> Result<SessionSpec> {
        check_name("session name", name)?;
        check_labels(&labels)?;
        config.validate().map_err(|e| ServiceError::Invalid(e.to_string()))?;
        let window = if window == 0 { DEFAULT_WINDOW } else { window };
        if window > MAX_WINDOW {
            return Err(ServiceError::Invalid(format!("window {window} is larger than {MAX_WINDOW}")));
        }
        Ok(SessionSpec { name: name.to_owned(), refset: refset.to_owned(), config, labels, window })
    }

    /// Create a session (builds its tables: CPU work, call from a blocking thread). With
    /// `if_not_exists`, an existing session with the same definition is returned as is.
    pub fn create_session(&self, spec: SessionSpec, if_not_exists: bool) -> Result<Arc<Session>> {
        let set = self.refset(&spec.refset)?;
        if let Some(existing) = self.inner.sessions.get(&spec.name) {
            let same = existing.spec().refset == spec.refset && existing.spec().config == spec.config && existing.spec().labels == spec.labels && existing.spec().window == spec.window;
            return if if_not_exists && same { Ok(Arc::clone(existing.value())) } else { Err(ServiceError::SessionExists(spec.name)) };
        }
        if self.inner.sessions.len() >= self.inner.limits.max_sessions {
            return Err(ServiceError::Limit { what: format!("{} sessions", self.inner.sessions.len() + 1), limit: self.inner.limits.max_sessions as u64, key: "limits.max_sessions" });
        }
        let session = Arc::new(Session::new(spec, Arc::clone(&set.set), unix_now()));
        match self.inner.sessions.entry(session.spec().name.clone()) {
            Entry::Occupied(e) => {
                // Created concurrently by another request.
                let same = e.get().spec().config == session.spec().config && e.get().spec().refset == session.spec().refset;
                if if_not_exists && same {
                    Ok(Arc::clone(e.get()))
                } else {
                    Err(ServiceError::SessionExists(session.spec().name.clone()))
                }
            }
            Entry::Vacant(e) => {
                e.insert(Arc::clone(&session));
                Ok(session)
            }
        }
    }

    /// A session by name.
    pub fn session(&self, name: &str) -> Result<Arc<Session>> {
        self.inner.sessions.get(name).map(|e| Arc::clone(e.value())).ok_or_else(|| ServiceError::UnknownSession(name.to_owned()))
    }

    /// All sessions, by name.
    pub fn sessions(&self) -> Vec<Arc<Session>> {
        let mut v: Vec<_> = self.inner.sessions.iter().map(|e| Arc::clone(e.value())).collect();
        v.sort_by(|a, b| a.spec().name.cmp(&b.spec().name));
        v
    }

    /// Close (remove) a session.
    pub fn close_session(&self, name: &str) -> Result<Arc<Session>> {
        self.inner.sessions.remove(name).map(|(_, s)| s).ok_or_else(|| ServiceError::UnknownSession(name.to_owned()))
    }

    /// Claim (session, producer) for one live stream; the guard releases it.
    pub fn claim_producer(&self, session: &str, producer: &str) -> Result<ProducerClaim> {
        let key = (session.to_owned(), producer.to_owned());
        match self.inner.streaming.entry(key.clone()) {
            Entry::Occupied(_) => Err(ServiceError::ProducerBusy { session: key.0, producer: key.1 }),
            Entry::Vacant(e) => {
                e.insert(());
                Ok(ProducerClaim { state: self.clone(), key })
            }
        }
    }
}

/// A live stream's hold on (session, producer).
pub struct ProducerClaim {
    state: State,
    key: (String, String),
}

impl Drop for ProducerClaim {
    fn drop(&mut self) {
        self.state.inner.streaming.remove(&self.key);
    }
}
