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
use crate::metric::{CorpusStats, ScoreConfig};
use crate::session::Outcome;
use crate::store::{BatchWrite, Store};
use crate::refs::{InputError, LoadError, RefFormat, RefSet};
use crate::session::{check_labels, check_name, Session, SessionSpec, DEFAULT_WINDOW, MAX_WINDOW};

use super::limits::Limits;

/// A loaded reference-set version.
#[derive(Debug)]
pub struct LoadedSet {
    /// Registry name.
    pub name: String,
    /// The segments.
    pub set: Arc<RefSet>,
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
    streams: Arc<std::sync::atomic::AtomicUsize>,
    watchers: Arc<std::sync::atomic::AtomicUsize>,
    /// Durable state (None: in memory only).
    store: Option<Arc<Store>>,
    /// Queue of the group-commit thread (with a store).
    committer: Option<std::sync::Mutex<std::sync::mpsc::Sender<CommitRequest>>>,
}

/// Statistics after an applied batch: (cumulative, recent).
pub type AfterBatch = (CorpusStats, CorpusStats);

/// One batch waiting for the group commit.
struct CommitRequest {
    session: Arc<Session>,
    producer: String,
    sequence: u64,
    outcomes: Vec<Outcome>,
    rejected: u64,
    reply: tokio::sync::oneshot::Sender<Option<AfterBatch>>,
}

/// Exit code of the process when the store cannot be written: acknowledged batches must be
/// durable, so the server stops rather than acknowledge what it could not keep.
pub const EXIT_STORE_FAILURE: i32 = 70;

/// Seconds since the Unix epoch.
pub fn unix_now() -> i64 {
    SystemTime::now().duration_since(UNIX_EPOCH).map_or(0, |d| d.as_secs() as i64)
}

impl State {
    /// Empty state. `refset_dir`: where server-side loading may read (None: disabled).
    pub fn new(refset_dir: Option<PathBuf>, limits: Limits) -> Result<State> {
        State::with_store(refset_dir, limits, None, std::time::Duration::ZERO)
    }

    /// State backed by `store`: batches are applied and written by one group-commit thread that
    /// gathers what arrives within `group_commit` into one transaction.
    pub fn with_store(refset_dir: Option<PathBuf>, limits: Limits, store: Option<Arc<Store>>, group_commit: std::time::Duration) -> Result<State> {
        let refset_dir = match refset_dir {
            Some(d) => Some(std::fs::canonicalize(&d).map_err(|e| ServiceError::Invalid(format!("--refset-dir {}: {e}", d.display())))?),
            None => None,
        };
        let slots = std::thread::available_parallelism().map_or(1, |n| n.get());
        let (tx, rx) = std::sync::mpsc::channel::<CommitRequest>();
        let committer = store.as_ref().map(|_| std::sync::Mutex::new(tx));
        let state = State { inner: Arc::new(Inner { refsets: DashMap::new(), sessions: DashMap::new(), streaming: DashMap::new(), refset_dir, limits, scoring_slots: tokio::sync::Semaphore::new(slots), streams: Default::default(), watchers: Default::default(), store: store.clone(), committer }) };
        if let Some(store) = store {
            // The thread holds only a weak handle, so it ends when the state is dropped.
            let weak = Arc::downgrade(&state.inner);
            std::thread::Builder::new()
                .name("mtgauge-commit".into())
                .spawn(move || commit_loop(store, weak, rx, group_commit))
                .map_err(|e| ServiceError::Internal(format!("cannot start the commit thread: {e}")))?;
        }
        Ok(state)
    }

    /// The store, when durable.
    pub fn store(&self) -> Option<&Arc<Store>> {
        self.inner.store.as_ref()
    }

    fn persist(&self, f: impl FnOnce(&Store) -> std::result::Result<(), crate::store::StoreError>) -> Result<()> {
        match &self.inner.store {
            Some(s) => f(s).map_err(|e| ServiceError::Internal(e.to_string())),
            None => Ok(()),
        }
    }

    /// Apply a scored batch to its session; with a store, only once it is durable. None: the
    /// batch was a duplicate and changed nothing.
    pub async fn apply_batch(&self, session: Arc<Session>, producer: String, sequence: u64, outcomes: Vec<Outcome>, rejected: u64) -> Result<Option<AfterBatch>> {
        match &self.inner.committer {
            None => {
                let mut st = session.state();
                Ok(st.apply(&producer, sequence, &outcomes, rejected).map(|_| (st.cumulative, st.window.stats())))
            }
            Some(tx) => {
                let (reply, rx) = tokio::sync::oneshot::channel();
                let req = CommitRequest { session, producer, sequence, outcomes, rejected, reply };
                tx.lock().unwrap_or_else(|e| e.into_inner()).send(req).map_err(|_| ServiceError::ShuttingDown)?;
                rx.await.map_err(|_| ServiceError::ShuttingDown)
            }
        }
    }

    /// Rebuild the in-memory state from the store (at startup, before serving).
    pub fn restore(&self) -> Result<usize> {
        let Some(store) = &self.inner.store else { return Ok(0) };
        let snap = store.load().map_err(|e| ServiceError::Internal(e.to_string()))?;
        let versions: std::collections::HashMap<String, Arc<RefSet>> = snap.versions.into_iter().map(|(k, v)| (k, Arc::new(v))).collect();
        for (name, digest) in snap.names {
            crate::telemetry::record_refset(&name, versions[&digest].len(), versions[&digest].memory_bytes());
            self.inner.refsets.insert(name.clone(), Arc::new(LoadedSet { name, set: Arc::clone(&versions[&digest]) }));
        }
        let n = snap.sessions.len();
        for s in snap.sessions {
            let config = s.spec.config;
            let session = Session::new(s.spec, Arc::clone(&versions[&s.refset_digest]), s.created_unix);
            let window = crate::session::Window::restore(session.spec().window, &config, s.window_rows, s.next_row).map_err(|e| ServiceError::Internal(format!("store: session {}: {e}", session.spec().name)))?;
            let spec = session.spec();
            crate::telemetry::record_session_info(&spec.name, &spec.refset, &session.refs().digest_hex(), &spec.config.describe(), &spec.labels, true);
            crate::telemetry::init_session(&spec.name, &config, [s.counts.scored, s.counts.unknown, s.counts.rejected], &s.cumulative);
            crate::telemetry::record_scores(&spec.name, &config, &s.cumulative, &window.stats());
            session.restore(crate::session::SessionState { cumulative: s.cumulative, window, counts: s.counts, producers: s.marks });
            self.inner.sessions.insert(session.spec().name.clone(), Arc::new(session));
        }
        Ok(n)
    }

    /// Zero a session's statistics (durably).
    pub fn reset_session(&self, session: &Session) -> Result<()> {
        let next_row = session.state().window.next_id();
        self.persist(|s| s.reset_session(&session.spec().name, next_row))?;
        session.reset();
        Ok(())
    }

    /// Count one more open scoring stream, or refuse it past `limits.max_streams`.
    pub fn enter_stream(&self) -> Result<Gate> {
        Gate::enter(&self.inner.streams, self.inner.limits.max_streams, "scoring streams", "limits.max_streams")
    }

    /// Count one more watch subscriber, or refuse it past `limits.max_watchers`.
    pub fn enter_watcher(&self) -> Result<Gate> {
        Gate::enter(&self.inner.watchers, self.inner.limits.max_watchers, "watch subscribers", "limits.max_watchers")
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
    pub fn parse_refset(&self, format: RefFormat, files: &[(String, Vec<u8>)], source: Option<&(String, Vec<u8>)>) -> Result<RefSet> {
        let total: u64 = files.iter().chain(source).map(|(_, b)| b.len() as u64).sum();
        if total > self.inner.limits.max_refset_bytes {
            return Err(ServiceError::Limit { what: format!("reference set input of {total} bytes"), limit: self.inner.limits.max_refset_bytes, key: "limits.max_refset_bytes" });
        }
        let streams: Vec<(&str, &[u8])> = files.iter().map(|(n, b)| (n.as_str(), b.as_slice())).collect();
        crate::refs::load(format, &streams, source.map(|(n, b)| (n.as_str(), b.as_slice()))).map_err(|e| match e {
            LoadError::Input(e) => ServiceError::Input(e),
            LoadError::JsonlFiles(_) | LoadError::JsonlSource => ServiceError::Invalid("a JSONL reference set is exactly one file, without a source file".into()),
            e => ServiceError::Invalid(e.to_string()),
        })
    }

    /// Register a reference set under `name`.
    pub fn insert_refset(&self, name: &str, set: RefSet, replace: bool) -> Result<Arc<LoadedSet>> {
        check_name("reference set name", name)?;
        let loaded = Arc::new(LoadedSet { name: name.to_owned(), set: Arc::new(set) });
        let len = self.inner.refsets.len();
        // Checked before taking the entry (iterating the map under its guard would deadlock);
        // concurrent loads of different names may pass it together.
        self.check_total_bytes(Some(name), &loaded.set)?;
        // The entry guard serialises writers of this name, so memory and store agree.
        match self.inner.refsets.entry(name.to_owned()) {
            Entry::Occupied(mut e) => {
                if !replace {
                    return Err(ServiceError::RefSetExists(name.to_owned()));
                }
                if e.get().set.digest() != loaded.set.digest() {
                    self.persist(|s| s.put_refset(name, &loaded.set))?;
                    e.insert(Arc::clone(&loaded));
                } else {
                    return Ok(Arc::clone(e.get()));
                }
            }
            Entry::Vacant(e) => {
                if len >= self.inner.limits.max_refsets {
                    return Err(ServiceError::Limit { what: format!("{} reference sets", len + 1), limit: self.inner.limits.max_refsets as u64, key: "limits.max_refsets" });
                }
                self.persist(|s| s.put_refset(name, &loaded.set))?;
                e.insert(Arc::clone(&loaded));
            }
        }
        Ok(loaded)
    }

    /// Refuse a set that would take all loaded sets past `limits.max_total_refset_bytes`
    /// (`replacing`: the name whose current version it replaces). Versions that sessions still
    /// hold after a replacement are not counted: they go when their sessions close.
    fn check_total_bytes(&self, replacing: Option<&str>, set: &RefSet) -> Result<()> {
        let others: u64 = self.inner.refsets.iter().filter(|e| Some(e.key().as_str()) != replacing).map(|e| e.value().set.memory_bytes() as u64).sum();
        let total = others + set.memory_bytes() as u64;
        let limit = self.inner.limits.max_total_refset_bytes;
        if total > limit {
            return Err(ServiceError::Limit { what: format!("{total} bytes of loaded reference sets"), limit, key: "limits.max_total_refset_bytes" });
        }
        Ok(())
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
        if !self.inner.refsets.contains_key(name) {
            return Err(ServiceError::UnknownRefSet(name.to_owned()));
        }
        self.persist(|s| s.delete_refset(name))?;
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
    pub fn create_session(&self, spec: SessionSpec, if_not_exists: bool) -> Result<(Arc<Session>, bool)> {
        let set = self.refset(&spec.refset)?;
        if let Some(existing) = self.inner.sessions.get(&spec.name) {
            let same = existing.spec().refset == spec.refset && existing.spec().config == spec.config && existing.spec().labels == spec.labels && existing.spec().window == spec.window;
            return if if_not_exists && same { Ok((Arc::clone(existing.value()), false)) } else { Err(ServiceError::SessionExists(spec.name)) };
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
                    Ok((Arc::clone(e.get()), false))
                } else {
                    Err(ServiceError::SessionExists(session.spec().name.clone()))
                }
            }
            Entry::Vacant(e) => {
                self.persist(|s| s.put_session(session.spec(), &session.refs().digest_hex(), session.created_unix()))?;
                e.insert(Arc::clone(&session));
                Ok((session, true))
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
        if !self.inner.sessions.contains_key(name) {
            return Err(ServiceError::UnknownSession(name.to_owned()));
        }
        self.persist(|s| s.delete_session(name))?;
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

/// The group-commit thread: the one writer of batch effects. Each round takes everything that
/// arrives within `interval` of the first request, applies it to the sessions in memory, writes
/// it in one transaction, and only then answers (so an acknowledged batch is durable, and a
/// duplicate is only acknowledged once its original is).
fn commit_loop(store: Arc<Store>, state: std::sync::Weak<Inner>, rx: std::sync::mpsc::Receiver<CommitRequest>, interval: std::time::Duration) {
    use std::sync::mpsc::RecvTimeoutError;
    while let Ok(first) = rx.recv() {
        let mut group = vec![first];
        let deadline = std::time::Instant::now() + interval;
        loop {
            let left = deadline.saturating_duration_since(std::time::Instant::now());
            match rx.recv_timeout(left) {
                Ok(r) => group.push(r),
                Err(RecvTimeoutError::Timeout) | Err(RecvTimeoutError::Disconnected) => break,
            }
        }
        let live = state.upgrade();
        let mut writes = Vec::new();
        let mut replies = Vec::with_capacity(group.len());
        for r in group {
            let name = r.session.spec().name.clone();
            // A session closed meanwhile: nothing is written for it.
            let current = live.as_ref().and_then(|s| s.sessions.get(&name).map(|e| Arc::ptr_eq(e.value(), &r.session))).unwrap_or(false);
            let mut st = r.session.state();
            let applied = st.apply(&r.producer, r.sequence, &r.outcomes, r.rejected);
            let after = applied.as_ref().map(|_| (st.cumulative, st.window.stats()));
            drop(st);
            if let (Some(a), true) = (applied, current) {
                writes.push(BatchWrite { session: name, applied: a });
            }
            replies.push((r.reply, after));
        }
        if !writes.is_empty() {
            if let Err(e) = store.commit_batches(&writes) {
                tracing::error!(error = %e, "cannot write the store; stopping so that nothing unsaved is acknowledged");
                eprintln!("mtgauge: error: {e}");
                std::process::exit(EXIT_STORE_FAILURE);
            }
        }
        for (reply, after) in replies {
            let _ = reply.send(after);
        }
    }
}

/// A counted place under a limit; leaving is dropping the guard.
pub struct Gate {
    count: Arc<std::sync::atomic::AtomicUsize>,
}

impl Gate {
    fn enter(count: &Arc<std::sync::atomic::AtomicUsize>, limit: usize, what: &str, key: &'static str) -> Result<Gate> {
        use std::sync::atomic::Ordering;
        let n = count.fetch_add(1, Ordering::AcqRel) + 1;
        if n > limit {
            count.fetch_sub(1, Ordering::AcqRel);
            return Err(ServiceError::Limit { what: format!("{n} {what}"), limit: limit as u64, key });
        }
        Ok(Gate { count: Arc::clone(count) })
    }
}

impl Drop for Gate {
    fn drop(&mut self) {
        self.count.fetch_sub(1, std::sync::atomic::Ordering::AcqRel);
    }
}
