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
use crate::metric::resample::{Resampling, MAX_SESSION_RESAMPLES};
use crate::metric::ScoreConfig;
use crate::session::{Applied, Outcome};
use crate::store::{BatchWrite, Store, StoreError};
use crate::refs::{InputError, LoadError, RefFormat, RefSet};
use crate::session::{check_labels, check_name, Session, SessionSpec, DEFAULT_WINDOW, MAX_WINDOW};

use super::limits::{Limit, Limits};

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
    /// This replica's name and fleet (set once at startup; unset: none).
    fleet: std::sync::OnceLock<super::fleet::Fleet>,
    watchers: Arc<std::sync::atomic::AtomicUsize>,
    /// Durable state (None: in memory only).
    store: Option<Arc<Store>>,
    /// Queue of the group-commit thread (with a store).
    committer: Option<std::sync::Mutex<std::sync::mpsc::Sender<CommitRequest>>>,
    /// Set once when the store cannot be written (see [`State::store_failure`]).
    failure: tokio::sync::watch::Sender<Option<String>>,
    /// The alert states the evaluator last published.
    alerts: super::alerting::AlertBoard,
    /// How long sessions keep their history (set once at startup; unset: the defaults).
    history: std::sync::OnceLock<crate::session::history::HistoryConfig>,
}

/// A scored batch on its way into its session.
pub struct Pending {
    /// The session it was scored for.
    pub session: Arc<Session>,
    /// Producer id (empty: no duplicate detection).
    pub producer: String,
    /// The producer's batch sequence number.
    pub sequence: u64,
    /// What each valid item came to.
    pub outcomes: Vec<Outcome>,
    /// Items refused as invalid.
    pub rejected: u64,
    /// The replicate sums of the scored items ([`Session::replicate_delta`], computed while
    /// scoring; None: computed when applied, or the session keeps none).
    pub replicates: Option<crate::metric::resample::Replicates>,
    /// The guard counts of the batch's items.
    pub guards: crate::guard::GuardCounts,
    /// What the batch's external values add (None: none carried any).
    pub external: Option<crate::external::ExternalDelta>,
}

/// A batch handed to [`commit`]: its effect, or the answer to wait for.
pub enum Committing {
    /// Applied already (in memory).
    Done(Box<Option<Applied>>),
    /// Queued for the group commit.
    Waiting(tokio::sync::oneshot::Receiver<Result<Option<Applied>>>),
}

impl Committing {
    /// The batch's effect once applied (and durable); None for a duplicate.
    pub async fn wait(self, state: &State) -> Result<Option<Applied>> {
        match self {
            Committing::Done(effect) => Ok(*effect),
            Committing::Waiting(rx) => rx.await.map_err(|_| state.failed().map_or(ServiceError::ShuttingDown, ServiceError::StoreFailed))?,
        }
    }
}

/// One batch waiting for the group commit.
struct CommitRequest {
    batch: Pending,
    reply: tokio::sync::oneshot::Sender<Result<Option<Applied>>>,
}

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
        let (failure, _) = tokio::sync::watch::channel(None);
        let state = State { inner: Arc::new(Inner { refsets: DashMap::new(), sessions: DashMap::new(), streaming: DashMap::new(), refset_dir, limits, scoring_slots: tokio::sync::Semaphore::new(slots), streams: Default::default(), watchers: Default::default(), store: store.clone(), committer, failure, alerts: Default::default(), fleet: Default::default(), history: Default::default() }) };
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

    /// Set this replica's name and fleet (once, at startup; a second call changes nothing).
    pub fn set_fleet(&self, fleet: super::fleet::Fleet) {
        let _ = self.inner.fleet.set(fleet);
    }

    /// This replica's name and fleet.
    pub fn fleet(&self) -> &super::fleet::Fleet {
        static NONE: super::fleet::Fleet = super::fleet::Fleet { name: None, members: Vec::new() };
        self.inner.fleet.get().unwrap_or(&NONE)
    }

    /// Set how long sessions keep their history (once, at startup, before sessions exist).
    pub fn set_history_config(&self, config: crate::session::history::HistoryConfig) {
        let _ = self.inner.history.set(config);
    }

    /// How long sessions keep their history.
    pub fn history_config(&self) -> crate::session::history::HistoryConfig {
        self.inner.history.get().copied().unwrap_or_default()
    }

    /// The alert states as last evaluated.
    pub fn alerts(&self) -> &super::alerting::AlertBoard {
        &self.inner.alerts
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

    /// Apply a scored batch to its session through [`commit`]: in memory right here, or with a
    /// store on the group-commit thread, answered only once it is durable. None: the batch was
    /// a duplicate and changed nothing.
    pub async fn apply_batch(&self, batch: Pending) -> Result<Option<Applied>> {
        self.submit_batch(batch)?.wait(self).await
    }

    /// Hand a scored batch to [`commit`] now (so batches of one stream keep their order) and
    /// return what to wait on for its effect: a stream scores its next batch meanwhile.
    pub fn submit_batch(&self, batch: Pending) -> Result<Committing> {
        let Some(tx) = &self.inner.committer else {
            let group = std::slice::from_ref(&batch);
            let effects = commit(Some(&self.inner), None, group).map_err(|e| ServiceError::StoreFailed(e.to_string()))?;
            publish(to_publish(group, &effects));
            return Ok(Committing::Done(Box::new(effects.into_iter().next().and_then(|(a, _)| a))));
        };
        let (reply, rx) = tokio::sync::oneshot::channel();
        let sent = tx.lock().unwrap_or_else(|e| e.into_inner()).send(CommitRequest { batch, reply });
        match (sent, self.failed()) {
            (_, Some(e)) => Err(ServiceError::StoreFailed(e)),
            (Err(_), None) => Err(ServiceError::ShuttingDown),
            (Ok(()), None) => Ok(Committing::Waiting(rx)),
        }
    }

    /// The store failure, once there was one.
    pub fn failed(&self) -> Option<String> {
        self.inner.failure.borrow().clone()
    }

    /// Resolves when the store could not be written, with the error: the server must stop,
    /// since it can no longer acknowledge anything durably.
    pub async fn store_failure(&self) -> String {
        let mut rx = self.inner.failure.subscribe();
        let got = rx.wait_for(Option::is_some).await.map(|f| f.clone().unwrap_or_default());
        match got {
            Ok(message) => message,
            // The sender lives in `self`: unreachable while it is borrowed.
            Err(_) => std::future::pending().await,
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
            let bad = |e: String| ServiceError::Internal(format!("store: session {}: {e}", session.spec().name));
            let in_window = s.records.len() - s.window_len;
            let window = crate::session::Window::restore(session.spec().window, &config, s.records[in_window..].iter().cloned(), s.next_row).map_err(bad)?;
            let spec = session.spec();
            let replicates = match spec.resampling.resamples {
                0 => None,
                _ => Some(crate::session::SessionReplicates::restore(&config, spec.resampling, &window, s.replicates, s.records_from, &s.records, |c| session.key_of(c)).map_err(bad)?),
            };
            crate::telemetry::record_session_info(&spec.name, &spec.refset, &session.refs().digest_hex(), &spec.config.describe(), &spec.resampling.describe(), &spec.labels, true);
            crate::telemetry::init_session(&spec.name, &config, [s.counts.scored, s.counts.unknown, s.counts.rejected], &s.cumulative);
            crate::telemetry::record_guards(&spec.name, &s.counts.guards, true);
            crate::telemetry::record_scores(&spec.name, &config, &s.cumulative, &window.stats());
            session.restore(crate::session::SessionState { cumulative: s.cumulative, window, counts: s.counts, producers: s.marks, replicates });
            session.restore_history(self.history_config(), s.history).map_err(bad)?;
            session.restore_external_history(self.history_config(), s.external_history).map_err(bad)?;
            if let Some(e) = s.external {
                session.restore_external(e, s.external_recent, s.external_next).map_err(bad)?;
            }
            crate::telemetry::record_external(&session.spec().name, &session.spec().external, &session.external().totals);
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
        Gate::enter(&self.inner.streams, self.inner.limits.max_streams, "scoring streams", Limit::MaxStreams.key())
    }

    /// Count one more watch subscriber, or refuse it past `limits.max_watchers`.
    pub fn enter_watcher(&self) -> Result<Gate> {
        Gate::enter(&self.inner.watchers, self.inner.limits.max_watchers, "watch subscribers", Limit::MaxWatchers.key())
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
            return Err(ServiceError::Limit { what: format!("reference set input of {total} bytes"), limit: self.inner.limits.max_refset_bytes, key: Limit::MaxRefsetBytes.key() });
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
                    return Err(ServiceError::Limit { what: format!("{} reference sets", len + 1), limit: self.inner.limits.max_refsets as u64, key: Limit::MaxRefsets.key() });
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
            return Err(ServiceError::Limit { what: format!("{total} bytes of loaded reference sets"), limit, key: Limit::MaxTotalRefsetBytes.key() });
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
    pub fn session_spec(&self, name: &str, refset: &str, config: ScoreConfig, labels: BTreeMap<String, String>, window: usize, resampling: Resampling) -> Result<SessionSpec> {
        check_name("session name", name)?;
        check_labels(&labels)?;
        config.validate().map_err(|e| ServiceError::Invalid(e.to_string()))?;
        let window = if window == 0 { DEFAULT_WINDOW } else { window };
        if window > MAX_WINDOW {
            return Err(ServiceError::Invalid(format!("window {window} is larger than {MAX_WINDOW}")));
        }
        if resampling.resamples > MAX_SESSION_RESAMPLES {
            return Err(ServiceError::Invalid(format!("{} resamples are more than a session may keep ({MAX_SESSION_RESAMPLES})", resampling.resamples)));
        }
        Ok(SessionSpec { name: name.to_owned(), refset: refset.to_owned(), config, labels, window, resampling, target_language: None, guard_settings: Vec::new(), external: Default::default() })
    }

    /// Create a session (builds its tables: CPU work, call from a blocking thread). With
    /// `if_not_exists`, an existing session with the same whole definition (reference set name,
    /// configuration, labels and window) is returned as is; any difference is refused, naming
    /// what differs, so that a re-create never silently keeps other labels or another window.
    ///
    /// A session without a reference set (`spec.refset` empty) is reference-free: it scores
    /// nothing and counts its items as unknown, while the guards check those with a source.
    /// It needs its target language or external metrics (values only), and is kept over the
    /// empty set, stored as a version no name refers to.
    pub fn create_session(&self, spec: SessionSpec, if_not_exists: bool) -> Result<(Arc<Session>, bool)> {
        let reference_free = spec.refset.is_empty();
        if reference_free && spec.target_language.is_none() && spec.external.is_empty() {
            return Err(ServiceError::Invalid("a session without a reference set needs its target language (for the guards) or external metrics (for values alone): it would have nothing to count".into()));
        }
        let set = match reference_free {
            true => Arc::new(RefSet::new(Vec::new()).map_err(|e| ServiceError::Internal(e.to_string()))?),
            false => Arc::clone(&self.refset(&spec.refset)?.set),
        };
        let existing = |other: &Arc<Session>| match (if_not_exists, differences(other.spec(), &spec)) {
            (true, d) if d.is_empty() => Ok((Arc::clone(other), false)),
            (_, differs) => Err(ServiceError::SessionExists { name: spec.name.clone(), differs }),
        };
        if let Some(e) = self.inner.sessions.get(&spec.name) {
            return existing(e.value());
        }
        if self.inner.sessions.len() >= self.inner.limits.max_sessions {
            return Err(ServiceError::Limit { what: format!("{} sessions", self.inner.sessions.len() + 1), limit: self.inner.limits.max_sessions as u64, key: Limit::MaxSessions.key() });
        }
        let session = Arc::new(Session::new(spec.clone(), Arc::clone(&set), unix_now()));
        session.set_history_config(self.history_config());
        match self.inner.sessions.entry(spec.name.clone()) {
            // Created concurrently by another request: the same rule.
            Entry::Occupied(e) => existing(e.get()),
            Entry::Vacant(e) => {
                self.persist(|s| match reference_free {
                    true => s.put_session_over(session.spec(), &set, session.created_unix()),
                    false => s.put_session(session.spec(), &session.refs().digest_hex(), session.created_unix()),
                })?;
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

/// The parts of a session definition in which `a` and `b` differ (empty: the same).
pub fn differences(a: &SessionSpec, b: &SessionSpec) -> Vec<&'static str> {
    let parts = [("reference set", a.refset == b.refset), ("configuration", a.config == b.config), ("labels", a.labels == b.labels), ("window", a.window == b.window), ("resampling", a.resampling == b.resampling), ("target language", a.target_language == b.target_language), ("guard settings", a.guard_settings == b.guard_settings), ("external metrics", a.external == b.external)];
    parts.into_iter().filter(|(_, same)| !same).map(|(what, _)| what).collect()
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

/// The one path of an applied batch, in both modes: apply each batch of `group` to its
/// session in memory and write the effects in one transaction (with a store); [`publish`]
/// then hands them to telemetry, only once they are written. The effects come back in the
/// order of `group` (None: a duplicate), each with whether it is to be published: a session
/// closed meanwhile (not the one registered under its name in `live`) is neither written nor
/// published.
fn commit(live: Option<&Inner>, store: Option<&Store>, group: &[Pending]) -> std::result::Result<Vec<(Option<Applied>, bool)>, StoreError> {
    let mut effects = Vec::with_capacity(group.len());
    let now = unix_now();
    for p in group {
        let current = live.is_some_and(|l| l.sessions.get(&p.session.spec().name).is_some_and(|e| Arc::ptr_eq(e.value(), &p.session)));
        let mut applied = p.session.apply_at(now, &p.producer, p.sequence, &p.outcomes, p.rejected, p.replicates.as_ref(), &p.guards);
        if let Some(a) = applied.as_mut().filter(|_| !p.session.spec().external.is_empty()) {
            if let Some(d) = &p.external {
                // Checked when scored; only sums near the i128 limit fail here, and then
                // nothing is added (the batch's built-in statistics are applied already).
                match p.session.apply_external(d) {
                    Ok(rows) => {
                        a.external_rows = Some(rows);
                        match p.session.record_external(now, &d.totals) {
                            Ok(w) => a.external_history = Some(w),
                            Err(e) => tracing::error!(session = %p.session.spec().name, error = %e, "external values not counted in the history"),
                        }
                    }
                    Err(e) => tracing::error!(session = %p.session.spec().name, error = %e, "external values not counted"),
                }
            }
            // Every applied batch of such a session carries the copy: the store keeps the last.
            let (copy, ids) = p.session.external_durable();
            (a.external, a.external_window) = (Some(copy), Some(ids));
        }
        effects.push((applied, current));
    }
    if let Some(store) = store {
        let writes: Vec<BatchWrite<'_>> = kept(group, &effects).map(|(p, applied)| BatchWrite { session: &p.session.spec().name, applied }).collect();
        if !writes.is_empty() {
            store.commit_batches(&writes)?;
        }
    }
    Ok(effects)
}

/// The written effects of a group, with their batches.
fn kept<'a>(group: &'a [Pending], effects: &'a [(Option<Applied>, bool)]) -> impl Iterator<Item = (&'a Pending, &'a Applied)> {
    group.iter().zip(effects).filter_map(|(p, (a, current))| Some((p, a.as_ref().filter(|_| *current)?)))
}

/// What telemetry takes of one written batch.
struct Published {
    session: Arc<Session>,
    batch: crate::session::Counts,
    added: crate::metric::CorpusStats,
    /// The session's scores after the batch, for its last batch of the group only.
    scores: Option<(crate::metric::CorpusStats, crate::metric::CorpusStats)>,
    /// The session's external sums after the batch (sessions that declare external metrics).
    external: Option<crate::external::ExternalTotals>,
}

/// The telemetry of a committed group, taken before the effects go to their batches: counters
/// per batch, and each session's scores once, after its last batch of the group.
fn to_publish(group: &[Pending], effects: &[(Option<Applied>, bool)]) -> Vec<Published> {
    let written: Vec<_> = kept(group, effects).collect();
    written
        .iter()
        .enumerate()
        .map(|(i, (p, a))| {
            let last = !written[i + 1..].iter().any(|(q, _)| Arc::ptr_eq(&q.session, &p.session));
            Published { session: Arc::clone(&p.session), batch: a.batch, added: a.added.clone(), scores: last.then(|| (a.cumulative.clone(), a.recent.clone())), external: a.external.as_ref().map(|e| e.totals.clone()) }
        })
        .collect()
}

/// Hand a committed group's telemetry over (only once it is written).
fn publish(records: Vec<Published>) {
    for r in records {
        let spec = r.session.spec();
        crate::telemetry::record_batch(&spec.name, &spec.config, r.batch.scored, r.batch.unknown, r.batch.rejected, &r.added);
        crate::telemetry::record_guards(&spec.name, &r.batch.guards, false);
        if let Some((cumulative, recent)) = &r.scores {
            crate::telemetry::record_scores(&spec.name, &spec.config, cumulative, recent);
        }
        if let Some(t) = &r.external {
            crate::telemetry::record_external(&spec.name, &spec.external, t);
        }
    }
}

/// The group-commit thread: the one writer of batch effects. Each round takes everything that
/// arrives within `interval` of the first request and passes it to [`commit`] as one group, and
/// only then answers (so an acknowledged batch is durable, and a duplicate is only acknowledged
/// once its original is); telemetry follows the answers. When the store cannot be written,
/// every waiting batch is refused, the failure is reported through [`State::store_failure`],
/// and the thread ends.
fn commit_loop(store: Arc<Store>, state: std::sync::Weak<Inner>, rx: std::sync::mpsc::Receiver<CommitRequest>, interval: std::time::Duration) {
    while let Ok(first) = rx.recv() {
        // Sleep out the gathering time, then take everything that came: one wake-up per group,
        // not one per batch.
        if !interval.is_zero() {
            std::thread::sleep(interval);
        }
        let mut group = vec![first];
        group.extend(rx.try_iter());
        let started = std::time::Instant::now();
        let live = state.upgrade();
        let (batches, replies): (Vec<Pending>, Vec<_>) = group.into_iter().map(|r| (r.batch, r.reply)).unzip();
        match commit(live.as_deref(), Some(&store), &batches) {
            Ok(effects) => {
                crate::telemetry::record_group_commit(batches.len(), started.elapsed().as_secs_f64());
                let records = to_publish(&batches, &effects);
                for (reply, (effect, _)) in replies.into_iter().zip(effects) {
                    let _ = reply.send(Ok(effect));
                }
                publish(records);
            }
            Err(e) => {
                let message = e.to_string();
                tracing::error!(error = %message, "cannot write the store; stopping so that nothing unsaved is acknowledged");
                if let Some(l) = &live {
                    l.failure.send_replace(Some(message.clone()));
                }
                for reply in replies {
                    let _ = reply.send(Err(ServiceError::StoreFailed(message.clone())));
                }
                return;
            }
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
